"""apg-eval's figures and ``report.md``: what :func:`apg.report.run_report` measured, drawn and written down.

The numbers come from :mod:`apg.evaluation` (closed-loop metrics, robustness curves); nothing here recomputes them.
File names are fixed (``trajectories.png``, ``phase.png``, ``distributions.png``, ``robustness.png``,
``animation.gif``, ``report.md``) so the docs and tests name the same strings.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import matplotlib.pyplot as plt
import numpy as np
import torch
from matplotlib.figure import Figure
from torch import Tensor

from apg.checkpoint import atomic_write_text
from apg.evaluation import ClosedLoop, Curve, time_to_success
from apg.export import HARDWARE_CAUTION
from apg.reports.animation import animate
from apg.reports.figures import COLOURS, save, style, trajectory_figure
from envs.base import System

if TYPE_CHECKING:  # apg.report imports this module; the records are only read here
    from apg.report import EvalSettings, Subject

REPORT_NAME = "report.md"


# ---- figures ----------------------------------------------------------------------------------------------
def phase_figure(system: System, states: Tensor, success: Tensor, count: int) -> Figure:
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
        style(ax)
    for ax in axes.flat[n_q:]:
        ax.set_visible(False)
    fig.suptitle(f"{system.name}: phase portrait (o start, x end; dashed: not a success)", fontsize=10)
    fig.tight_layout()
    return fig


def distribution_figure(costs: Tensor, tts: Tensor, system: System) -> Figure:
    """Histograms of the total cost and of the time to success over the held-out episodes."""
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
        style(ax)
    fig.suptitle(f"{system.name}: cost and time-to-success over the held-out episodes", fontsize=10)
    fig.tight_layout()
    return fig


def robustness_figure(curves: dict[str, list[Curve]], subjects: Sequence[Subject], hold: float) -> Figure:
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
        style(ax)
    for ax in axes.flat[n:]:
        ax.set_visible(False)
    axes.flat[0].legend(fontsize=7, loc="lower left")
    fig.suptitle("robustness: success (solid, left) and mean cost (dashed, right); dotted: nominal and the "
                 f"{hold:.0%} line; shaded: ensemble training range", fontsize=9)
    fig.tight_layout()
    return fig


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


def report_markdown(subject: Subject, summary: dict[str, Any], curves: dict[str, list[Curve]],
                    subjects: Sequence[Subject], settings: EvalSettings, horizon: int, scale: Tensor, limits: dict,
                    files: dict[str, str]) -> str:
    """``report.md``: the summary table, the figures, the robustness tables and the hardware caution."""
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


def write_report(out: Path, subject: Subject, subjects: Sequence[Subject], run: ClosedLoop, summary: dict[str, Any],
                 curves: dict[str, list[Curve]], settings: EvalSettings, horizon: int, scale: Tensor,
                 limits: dict) -> dict[str, str]:
    """Write the PNG figures, the GIF of the median-cost episode (if ``settings.animation``) and ``report.md`` of
    ``subject``'s evaluation ``run`` into ``out``; return ``{part: file name}`` for every file written but the
    report."""
    system = subject.system  # the nominal plant (run.system is the one simulated, equal when undisturbed)
    files = {
        "trajectories": save(trajectory_figure(system, run.trajectory, run.success, settings.trajectories),
                             out / "trajectories.png"),
        "phase": save(phase_figure(system, run.trajectory.states, run.success, settings.trajectories),
                      out / "phase.png"),
        "distributions": save(distribution_figure(run.trajectory.total_cost, time_to_success(run), system),
                              out / "distributions.png"),
    }
    if curves:
        files["robustness"] = save(robustness_figure(curves, subjects, settings.robustness.hold),
                                   out / "robustness.png")
    if settings.animation:
        costs = run.trajectory.total_cost
        j = int(torch.argsort(costs)[len(costs) // 2])
        animate(system, run.trajectory.states[:, j].numpy(), run.trajectory.actions[:, j].numpy(),
                out / "animation.gif", fps=settings.fps, max_frames=settings.max_frames,
                title=f"{subject.label} (episode {j})")
        files["animation"] = "animation.gif"
    atomic_write_text(out / REPORT_NAME, report_markdown(subject, summary, curves, subjects, settings, horizon, scale,
                                                         limits, files))
    return files


__all__ = ["REPORT_NAME", "phase_figure", "distribution_figure", "robustness_figure", "report_markdown",
           "write_report"]
