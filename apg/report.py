"""``apg-eval``'s work: load a run or an exported file, evaluate it in closed loop, sweep its robustness, and write
a markdown report with PNG figures, a GIF and the numbers as JSON.

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

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import torch  # noqa: E402
from torch import Tensor, nn  # noqa: E402

import envs  # noqa: E402
from apg.animation import DRAWERS, animate  # noqa: E402
from apg.checkpoint import CHECKPOINT_NAME, atomic_write_text  # noqa: E402
from apg.evaluation import (DTYPES, Curve, SweepSettings, default_limits, reference_scale, simulate,  # noqa: E402
                            summarise, sweep, time_to_success)
from apg.export import HARDWARE_CAUTION, OnnxPolicy, read_metadata, system_from_metadata  # noqa: E402
from apg.plots import trajectory_figure  # noqa: E402
from apg.trainer import load_policy  # noqa: E402
from envs.base import System, check_record  # noqa: E402

log = logging.getLogger(__name__)
REPORT_NAME = "report.md"
NUMBERS_NAME = "evaluation.json"
COLOURS = ("#27303f", "#d2492a", "#1f8a70", "#7a5195", "#e8a33d")


@dataclass(frozen=True)
class EvalSettings:
    """What ``apg-eval`` measures; ``configs/eval.yaml`` fills this record."""

    episodes: int = 512  # held-out initial states
    seed: int = 20_000  # seed of those states (the training's held-out set uses train.eval_seed = 10000)
    horizon: int = 0  # steps per episode; 0: the training's evaluation horizon
    dtype: str = "float64"  # simulator arithmetic; the policy computes in its own dtype (float32 for ONNX)
    limits: tuple[tuple[str, float, float], ...] = ()  # state limits (name, low, high), added to the defaults
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
    policy, state = load_policy(path)
    cfg = state.get("config", {}) or {}
    sysc = cfg.get("system", {}) or {}
    system = envs.build(state["system"], params=sysc.get("params"), task=sysc.get("task"), dt=sysc.get("dt"),
                       integrator=sysc.get("integrator", "rk4"))
    train = cfg.get("train", {}) or {}
    run_dir = path if path.is_dir() else path.parent
    own_dir = path.is_dir() or path.name == CHECKPOINT_NAME
    name = label or cfg.get("experiment") or (run_dir.name if own_dir else path.stem)
    return Subject(str(name), path, "run", system, _InOwnDtype(policy), int(train.get("eval_horizon") or
                                                                             train.get("horizon") or 0),
                   dict(sysc.get("ensemble") or {}))


def default_output(path: Path | str) -> Path:
    """``<run dir>/eval`` for a run, ``<stem>_eval`` beside an exported file."""
    path = Path(path)
    if path.suffix == ".onnx":
        return path.with_name(path.stem + "_eval")
    return (path if path.is_dir() else path.parent) / "eval"


# ---- figures ----------------------------------------------------------------------------------------------
def _style(ax) -> None:
    ax.grid(alpha=0.3)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def phase_figure(system: System, states: Tensor, success: Tensor, count: int):
    """One panel per generalised coordinate: ``q_i`` against ``qd_i`` for ``count`` episodes."""
    s = states[:, :count].double().numpy()  # (T+1, n, nx)
    ok = success[:count].numpy()
    n_q = system.n_q
    cols = min(3, n_q)
    rows = math.ceil(n_q / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(4.2 * cols, 3.6 * rows), squeeze=False)
    colours = plt.get_cmap("viridis")(np.linspace(0.05, 0.85, s.shape[1]))
    for i in range(n_q):
        ax = axes.flat[i]
        q = s[..., i]
        if system.state[i].angle:
            q = np.angle(np.exp(1j * q))
        qd = s[..., n_q + i]
        for j in range(s.shape[1]):
            ax.plot(q[:, j], qd[:, j], "-" if ok[j] else "--", color=colours[j], lw=1)
            ax.plot(q[0, j], qd[0, j], "o", color=colours[j], ms=4)
            ax.plot(q[-1, j], qd[-1, j], "x", color=colours[j], ms=6)
        qs, vs = system.state[i], system.state[n_q + i]
        ax.set_xlabel(f"{qs.name} [{qs.unit}]")
        ax.set_ylabel(f"{vs.name} [{vs.unit}]")
        _style(ax)
    for ax in axes.flat[n_q:]:
        ax.set_visible(False)
    fig.suptitle(f"{system.name}: phase portrait (o start, x end; dashed: not a success)", fontsize=10)
    fig.tight_layout()
    return fig


def distribution_figure(costs: Tensor, tts: Tensor, system: System):
    fig, (a, b) = plt.subplots(1, 2, figsize=(9, 3.2))
    c = costs.double().numpy()
    a.hist(c[np.isfinite(c)], bins=40, color=COLOURS[0])
    a.set_xlabel("total cost per episode")
    a.set_ylabel("episodes")
    t = tts.numpy()
    t = t[~np.isnan(t)]
    if len(t):
        b.hist(t, bins=30, color=COLOURS[2])
    b.set_xlabel("time to success [s]")
    for ax in (a, b):
        _style(ax)
    fig.suptitle(f"{system.name}: cost and time-to-success over the held-out episodes", fontsize=10)
    fig.tight_layout()
    return fig


def robustness_figure(curves: dict[str, list[Curve]], subjects: Sequence[Subject], hold: float):
    """One panel per axis: success rate (solid) and mean cost (dashed, right axis) for every source; a band
    marks each ensemble source's training range."""
    first = next(iter(curves.values()))
    n = len(first)
    cols = min(3, n)
    rows = math.ceil(n / cols)
    fig, axes = plt.subplots(rows, cols, figsize=(4.4 * cols, 3.3 * rows), squeeze=False)
    for k, base in enumerate(first):
        ax = axes.flat[k]
        twin = ax.twinx()
        for s_idx, subject in enumerate(subjects):
            c = curves[subject.label][k]
            colour = COLOURS[s_idx % len(COLOURS)]
            ax.plot(c.values, c.success, "-o", color=colour, ms=3, lw=1.6, label=subject.label)
            twin.plot(c.values, c.mean_cost, "--", color=colour, lw=1, alpha=0.7)
            if base.axis.startswith("param:"):
                rng = subject.ensemble.get(base.axis[len("param:"):])
                if rng:
                    ax.axvspan(rng[0], rng[1], color=colour, alpha=0.08, lw=0)
        ax.axvline(base.values[base.nominal_index], color=COLOURS[0], lw=0.8, ls=":")
        ax.axhline(hold, color=COLOURS[2], lw=0.6, ls=":")
        ax.set_ylim(-0.03, 1.03)
        ax.set_xlabel(base.label, fontsize=8)
        ax.set_ylabel("success rate")
        twin.set_ylabel("mean cost (dashed)", fontsize=8)
        twin.ticklabel_format(axis="y", style="sci", scilimits=(-3, 4), useOffset=False)
        _style(ax)
    for ax in axes.flat[n:]:
        ax.set_visible(False)
    axes.flat[0].legend(fontsize=7, loc="lower left")
    fig.suptitle("robustness: success (solid, left) and mean cost (dashed, right); dotted: nominal and the "
                 f"{hold:.0%} line; shaded: ensemble training range", fontsize=9)
    fig.tight_layout()
    return fig


def _save(fig, path: Path) -> str:
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path.name


# ---- the report -------------------------------------------------------------------------------------------
def _fmt(v: Any, digits: int = 4) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}g}"
    return str(v)


def _held_text(c: Curve) -> str:
    if c.held is None:
        return "not even at nominal"
    return f"{c.held[0]:.4g} to {c.held[1]:.4g}"


def _markdown(subject: Subject, summary: dict[str, Any], curves: dict[str, list[Curve]], subjects: Sequence[Subject],
              settings: EvalSettings, horizon: int, scale: Tensor, limits: dict, files: dict[str, str]) -> str:
    system = subject.system
    s = summary
    lines = [f"# Closed-loop evaluation: {subject.label}", "",
             f"Source `{subject.path}` ({subject.kind}); system `{system.name}`, dt {system.dt} s, {horizon} steps "
             f"({horizon * system.dt:.4g} s); {s['episodes']} held-out episodes (seed {settings.seed}); simulator in "
             f"{settings.dtype}.", "",
             f"Success criterion: {system.success_criterion}.", "",
             "| measure | value |", "| --- | --- |",
             f"| success rate | {s['success_rate']:.1%} (95 % interval {s['success_ci95'][0]:.1%} to "
             f"{s['success_ci95'][1]:.1%}) |",
             f"| total cost: mean (std) | {_fmt(s['cost']['mean'])} ({_fmt(s['cost']['std'])}) |",
             "| total cost: 5 / 25 / 50 / 75 / 95 % | " + " / ".join(_fmt(s['cost'][f'p{p}']) for p in
                                                                     (5, 25, 50, 75, 95)) + " |",
             f"| time to success: median / 95 % [s] | {_fmt(s['time_to_success_s']['median'])} / "
             f"{_fmt(s['time_to_success_s']['p95'])} ({s['time_to_success_s']['reached']} episodes) |"]
    for name, v in s["saturation_fraction"].items():
        lines.append(f"| saturation of {name} (within 1 % of a limit) | {v:.1%} of steps |")
    for name, v in s["state_limit_violations"].items():
        what = "any state limit" if name == "any" else (f"{name} outside [{limits[name][0]:.4g}, "
                                                         f"{limits[name][1]:.4g}]")
        lines.append(f"| episodes with {what} | {v:.1%} |")
    lines += ["", f"![trajectories]({files['trajectories']})", "", f"![phase portrait]({files['phase']})", "",
              f"![distributions]({files['distributions']})", ""]
    if "animation" in files:
        lines += [f"![animation of the median-cost episode]({files['animation']})", ""]
    if curves:
        names = [st.name for st in system.state]
        lines += ["## Robustness", "",
                  "Each point is the full held-out set on a plant that departs from the nominal model in one way. "
                  "Noise and pushes are in reference scales per state: "
                  + ", ".join(f"{n} {float(v):.3g}" for n, v in zip(names, scale)) +
                  " (state units; half the initial-state box unless set). A push is an impulsive change of every "
                  f"generalised velocity by that many reference scales with a random sign, at "
                  f"{settings.robustness.push_time:.0%} of the horizon. Delay: the plant receives the action computed "
                  f"that many steps earlier. Actuator gain: the plant receives gain x the commanded action.", "",
                  f"![robustness]({files['robustness']})", "",
                  f"Range over which the success rate stays at or above {settings.robustness.hold:.0%}:", "",
                  "| axis | " + " | ".join(st.label for st in subjects) + " |",
                  "| --- | " + " | ".join("---" for _ in subjects) + " |"]
        first = curves[subjects[0].label]
        for k, c in enumerate(first):
            lines.append(f"| {c.label} | " + " | ".join(_held_text(curves[st.label][k]) for st in subjects) + " |")
        for k, c in enumerate(first):
            lines += ["", f"**{c.label}**", "", "| value | " + " | ".join(f"{st.label}: success / cost" for st in
                                                                         subjects) + " |",
                      "| --- | " + " | ".join("---" for _ in subjects) + " |"]
            for j, v in enumerate(c.values):
                mark = " (nominal)" if j == c.nominal_index else ""
                lines.append(f"| {v:.4g}{mark} | " + " | ".join(
                    f"{curves[st.label][k].success[j]:.1%} / {_fmt(curves[st.label][k].mean_cost[j])}"
                    for st in subjects) + " |")
    lines += ["", "## Before hardware", "", HARDWARE_CAUTION, ""]
    return "\n".join(lines)


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
    limits = default_limits(system)
    for name, low, high in settings.limits:
        if name not in names:
            raise ValueError(f"limits.{name}: {system.name} has no state {name!r}; its states are {names}")
        limits[name] = (low, high)
    scale = reference_scale(system, dict(settings.scale))
    x0 = system.sample_initial(settings.episodes, torch.Generator().manual_seed(settings.seed), dtype)

    say(f"evaluating {main.label}: {settings.episodes} episodes of {horizon} steps")
    run = simulate(system, main.policy, x0, horizon, scale=scale)
    summary = summarise(run, limits)
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
    files = {
        "trajectories": _save(trajectory_figure(system, run.trajectory, run.success, settings.trajectories),
                              out / "trajectories.png"),
        "phase": _save(phase_figure(system, run.trajectory.states, run.success, settings.trajectories),
                       out / "phase.png"),
        "distributions": _save(distribution_figure(run.trajectory.total_cost, time_to_success(run), system),
                               out / "distributions.png"),
    }
    if curves:
        files["robustness"] = _save(robustness_figure(curves, subjects, settings.robustness.hold),
                                    out / "robustness.png")
    if settings.animation and system.name in DRAWERS:
        costs = run.trajectory.total_cost
        j = int(torch.argsort(costs)[len(costs) // 2])
        animate(system, run.trajectory.states[:, j].numpy(), run.trajectory.actions[:, j].numpy(),
                out / "animation.gif", fps=settings.fps, max_frames=settings.max_frames,
                title=f"{main.label} (episode {j})")
        files["animation"] = "animation.gif"
    numbers["files"] = files
    atomic_write_text(out / REPORT_NAME, _markdown(main, summary, curves, subjects, settings, horizon, scale, limits,
                                                   files))
    atomic_write_text(out / NUMBERS_NAME, json.dumps(numbers, indent=2, default=_json_default) + "\n")
    numbers["output"] = str(out)
    return numbers


def _json_default(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return str(v)
    if isinstance(v, tuple):
        return list(v)
    return str(v)


__all__ = ["EvalSettings", "Subject", "load_subject", "run_report", "default_output", "phase_figure",
           "robustness_figure", "REPORT_NAME", "NUMBERS_NAME"]
