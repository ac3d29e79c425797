"""``apg-eval``'s work: load a run or an exported file, evaluate it in closed loop, sweep its robustness, and write
a markdown report with PNG figures, a GIF (drawn by :mod:`apg.reports.evaluation_report`) and the numbers as JSON.

Every source in one report is simulated on the same nominal plant (the first source's), from the same held-out
initial states (``EvalSettings.seed``, kept apart from the training's held-out seed), so that curves drawn
together compare policies and nothing else.
"""

from __future__ import annotations

import dataclasses
import json
import logging
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import torch
from torch import Tensor, nn

from apg.checkpoint import CHECKPOINT_NAME, atomic_write_text
from apg.evaluation import (DTYPES, Curve, SweepSettings, disturbed_closed_loop, evaluation_metrics, reference_scale,
                            sweep)
from apg.export import OnnxPolicy, read_metadata, system_from_metadata
from apg.reports.evaluation_report import REPORT_NAME, write_report
from apg.runs import load_run
from envs.base import System, check_record

log = logging.getLogger(__name__)
NUMBERS_NAME = "evaluation.json"


@dataclass(frozen=True)
class EvalSettings:
    """What ``apg-eval`` measures; ``configs/eval.yaml`` fills this record."""

    episodes: int = 512  # held-out initial states
    seed: int = 20_000  # seed of those states (the training's held-out set uses train.eval_seed = 10000)
    horizon: int = 0  # steps per episode; 0: the training's evaluation horizon
    dtype: str = "float64"  # simulator arithmetic; the policy computes in its own dtype (float32 for ONNX)
    limits: tuple[tuple[str, float, float], ...] = ()  # state limits (name, low, high), added to the system's own
    scale: tuple[tuple[str, float], ...] = ()  # reference scales (name, value) replacing half the initial box
    robustness: SweepSettings = field(default_factory=SweepSettings)
    sweep: bool = True  # run the robustness sweep
    trajectories: int = 8  # episodes drawn in the trajectory and phase figures
    animation: bool = True  # write a GIF of the median-cost episode
    fps: int = 15
    max_frames: int = 120

    def __post_init__(self) -> None:
        if self.dtype not in DTYPES:
            raise ValueError(f"dtype must be one of {', '.join(DTYPES)}; got {self.dtype!r}")
        check_record(self, positive=("episodes", "trajectories", "fps", "max_frames"), nonnegative=("horizon",))
        for name, low, high in self.limits:
            if not low <= high:
                raise ValueError(f"limits.{name} must be [low, high] with low <= high, got [{low}, {high}]")


@dataclass(frozen=True)
class Subject:
    """A policy to evaluate and what is known about where it came from."""

    label: str
    path: Path
    kind: str  # "run" or "onnx"
    system: System  # the nominal system it was trained for
    policy: nn.Module
    horizon: int  # the training's evaluation horizon (0 if unknown)
    ensemble: dict[str, list[float]]  # training parameter ranges, {} for a nominal-model run


class _InOwnDtype(nn.Module):
    """Feed a torch policy in its own dtype and hand its actions back in the simulator's."""

    def __init__(self, policy: nn.Module) -> None:
        super().__init__()
        self.policy = policy.eval()
        self.dtype = next(iter(policy.buffers())).dtype

    def forward(self, obs: Tensor) -> Tensor:
        return self.policy(obs.to(self.dtype)).to(obs.dtype)


def load_subject(path: Path | str, label: str | None = None) -> Subject:
    """A run directory, a checkpoint file or an exported ``.onnx`` file, ready to evaluate.

    Raises:
        CheckpointError: a missing, corrupt or foreign checkpoint.
        PolicyFileError: an ``.onnx`` file that is unreadable or not an apg export.
        ValueError: a checkpoint whose policy does not fit its system.
    """
    path = Path(path)
    if path.suffix == ".onnx":
        meta = read_metadata(path)
        system = system_from_metadata(meta)
        return Subject(label or path.stem, path, "onnx", system, OnnxPolicy(path), int(meta.get("horizon", 0)),
                       dict(meta.get("training", {}).get("ensemble") or {}))
    run = load_run(path)
    record = run.record
    own_dir = path.is_dir() or path.name == CHECKPOINT_NAME
    name = label or record.experiment or (run.run_dir.name if own_dir else path.stem)
    return Subject(str(name), path, "run", run.system, _InOwnDtype(run.policy), record.train.eval_steps,
                   {k: list(v) for k, v in record.system.ensemble.items()})


def default_output(path: Path | str) -> Path:
    """``<run dir>/eval`` for a run, ``<stem>_eval`` beside an exported file."""
    path = Path(path)
    if path.suffix == ".onnx":
        return path.with_name(path.stem + "_eval")
    return (path if path.is_dir() else path.parent) / "eval"


# ---- the report -------------------------------------------------------------------------------------------
def run_report(sources: Sequence[Path | str], output: Path | str | None = None,
               settings: EvalSettings = EvalSettings(), *, labels: Sequence[str] = (),
               progress: Callable[[int, int, str], None] | None = None,
               say: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Evaluate ``sources[0]`` and sweep its robustness (and that of any further sources, for comparison);
    write ``report.md``, ``evaluation.json``, PNG figures and a GIF into ``output``.

    Returns:
        The numbers written to ``evaluation.json``.

    Raises:
        ValueError: no sources, sources for different systems, or a bad setting (named).
        CheckpointError / PolicyFileError: a source that cannot be read.
    """
    say = say or (lambda _m: None)
    if not sources:
        raise ValueError("source is required: a run directory, a checkpoint.pt or an exported .onnx file")
    if labels and len(labels) != len(sources):
        raise ValueError(f"labels must name every source ({len(sources)}), got {len(labels)}")
    subjects = []
    for i, src in enumerate(sources):
        say(f"loading {src}")
        subjects.append(load_subject(src, labels[i] if labels else None))
    if len({s.label for s in subjects}) != len(subjects):
        subjects = [dataclasses.replace(s, label=f"{s.label} ({i + 1})") for i, s in enumerate(subjects)]
    main = subjects[0]
    system = main.system
    for other in subjects[1:]:
        if other.system.name != system.name:
            raise ValueError(f"cannot compare {other.path} ({other.system.name}) with {main.path} ({system.name})")
        if other.system.params != system.params or other.system.dt != system.dt:
            log.warning("%s was trained for other nominal parameters or dt; it is evaluated on %s's plant",
                        other.label, main.label)
    horizon = settings.horizon or main.horizon
    if horizon < 1:
        raise ValueError(f"{main.path} does not say its evaluation horizon; set horizon=<steps>")
    dtype = DTYPES[settings.dtype]
    out = Path(output) if output else default_output(main.path)
    out.mkdir(parents=True, exist_ok=True)

    names = [st.name for st in system.state]
    limits = dict(system.state_limits)
    for name, low, high in settings.limits:
        if name not in names:
            raise ValueError(f"limits.{name}: {system.name} has no state {name!r}; its states are {names}")
        limits[name] = (low, high)
    scale = reference_scale(system, dict(settings.scale))
    x0 = system.sample_initial(settings.episodes, torch.Generator().manual_seed(settings.seed), dtype)

    say(f"evaluating {main.label}: {settings.episodes} episodes of {horizon} steps")
    run = disturbed_closed_loop(system, main.policy, x0, horizon, scale=scale)
    summary = evaluation_metrics(run, limits)
    numbers: dict[str, Any] = {"source": str(main.path), "label": main.label, "system": system.name,
                               "horizon": horizon, "dt": system.dt, "seed": settings.seed,
                               "success_criterion": system.success_criterion, "limits": limits,
                               "reference_scale": dict(zip(names, scale.tolist())), "evaluation": summary,
                               "ensemble": main.ensemble}

    curves: dict[str, list[Curve]] = {}
    if settings.sweep:
        for subject in subjects:
            say(f"robustness sweep of {subject.label}")
            curves[subject.label] = sweep(system, subject.policy, x0, horizon, settings.robustness,
                                          seed=settings.seed, scale=scale, progress=progress)
        numbers["robustness"] = {label: [c.as_dict() for c in cs] for label, cs in curves.items()}
        numbers["compared"] = [{"label": s.label, "source": str(s.path), "ensemble": s.ensemble} for s in subjects]

    say(f"drawing figures into {out}")
    numbers["files"] = write_report(out, main, subjects, run, summary, curves, settings, horizon, scale, limits)
    atomic_write_text(out / NUMBERS_NAME, json.dumps(numbers, indent=2, default=_json_default) + "\n")
    numbers["output"] = str(out)
    return numbers


def _json_default(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    if isinstance(v, tuple):
        return list(v)
    return str(v)


__all__ = ["EvalSettings", "Subject", "load_subject", "run_report", "default_output", "REPORT_NAME", "NUMBERS_NAME"]
