"""The project's look and the figures more than one tool draws: held-out trajectories (TensorBoard, apg-eval)
and the gradient profile (TensorBoard)."""

from __future__ import annotations

from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
import torch
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from apg.diagnostics import GradientProfile
from apg.rollout import Trajectory
from envs.base import System

# The look: warm paper, ink-coloured mechanism, one signal colour for what the controller drives, teal for goals.
PAPER = "#f3ede2"
INK = "#27303f"
SIGNAL = "#d2492a"
GOAL = "#1f8a70"
FAINT = "#b9ae9c"
COLOURS = (INK, SIGNAL, GOAL, "#7a5195", "#e8a33d")  # one per compared source, in this order


def style(ax: Axes) -> None:
    """Light grid, no top or right spine."""
    ax.grid(alpha=0.3)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)


def save(fig: Figure, path: Path, dpi: int = 110) -> str:
    """Write ``fig`` to ``path``, close it, and return the file name (for links in a report)."""
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return Path(path).name


def trajectory_figure(system: System, traj: Trajectory, success=None, count: int = 8) -> Figure:
    """One panel per state and action entry against time; successful trajectories solid, others dashed."""
    states = traj.states[:, :count].detach().cpu().double().numpy()  # (T+1, n, nx)
    actions = traj.actions[:, :count].detach().cpu().double().numpy()  # (T, n, nu)
    ok = None if success is None else success[:count].cpu().numpy()
    t = np.arange(states.shape[0]) * system.dt
    # Angles wrapped to (-pi, pi] so "upright" reads as 0 however many turns were made.
    entries = [(s.name, s.unit, np.angle(np.exp(1j * states[..., i])) if s.angle else states[..., i], t)
               for i, s in enumerate(system.state)]
    entries += [(a.name, a.unit, actions[..., i], t[:-1]) for i, a in enumerate(system.action)]
    cols = 2
    rows = (len(entries) + cols - 1) // cols
    fig, axes = plt.subplots(rows, cols, figsize=(9, 2.2 * rows), sharex=True, squeeze=False)
    colours = plt.get_cmap("viridis")(np.linspace(0.05, 0.85, states.shape[1]))
    for ax, (name, unit, values, time) in zip(axes.flat, entries):
        for j in range(values.shape[1]):
            dash = "-" if ok is None or ok[j] else "--"
            ax.plot(time, values[:, j], dash, color=colours[j], lw=1.2)
        ax.set_ylabel(f"{name}\n[{unit}]", fontsize=8)
        ax.grid(alpha=0.3)
    for ax in axes.flat[len(entries):]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("time [s]")
    title = f"{system.name}: {states.shape[1]} held-out trajectories"
    if ok is not None:
        title += " (solid: success, dashed: not)"
    fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return fig


def profile_figure(profile: GradientProfile) -> Figure:
    """A heatmap of ``log10`` batch-mean ``|dC/dx_t|`` (time on x, state entry on y) above a panel with the
    ``log10`` costate norm, action-gradient norm, amplification and Jacobian ``sigma_max`` against time."""
    t = profile.times.numpy()
    with np.errstate(divide="ignore", invalid="ignore"):
        heat = np.ma.masked_invalid(np.log10(profile.costate.numpy().T))  # (state_dim, T+1); zeros masked
        lines = [("costate norm |dC/dx_t|", t, np.log10(profile.costate_norm.numpy()), "-"),
                 ("action gradient norm |dC/du_t|", t[:-1],
                  np.log10(torch.linalg.vector_norm(profile.action, dim=-1).numpy()), "--"),
                 ("amplification |lambda_t| / sum_s>=t |g_s|", t, np.log10(profile.amplification.numpy()), ":"),
                 ("sigma_max(dx_t/dx_0)", t, np.log10(profile.jacobian_sigma.numpy()), "-")]
    n = len(profile.state_names)
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(9, 2.0 + 0.35 * n + 2.6), sharex=True,
                                      gridspec_kw={"height_ratios": [max(1.0, 0.35 * n), 2.6]})
    half = 0.5 * profile.dt
    mesh = top.imshow(heat, aspect="auto", origin="lower", interpolation="nearest", cmap="magma",
                      extent=(t[0] - half, t[-1] + half, -0.5, n - 0.5))
    top.set_yticks(range(n), profile.state_names, fontsize=8)
    top.set_title("log10 batch-mean |dC/dx_t| (costate) per state entry", fontsize=9)
    fig.colorbar(mesh, ax=top, pad=0.01).set_label("log10 |dC/dx_t[i]|", fontsize=8)
    colours = plt.get_cmap("viridis")([0.05, 0.35, 0.6, 0.85])
    for colour, (label, time, values, dash) in zip(colours, lines):
        bottom.plot(time, values, dash, color=colour, lw=1.4, label=label)
    bottom.set_ylabel("log10", fontsize=8)
    bottom.set_xlabel("time [s]")
    bottom.grid(alpha=0.3)
    bottom.legend(fontsize=8, loc="best")
    bottom.set_title(f"costate growth {profile.growth:.3g}x (largest amplification), "
                     f"sigma_max {profile.sigma_max:.3g}", fontsize=9)
    # The colourbar narrows the heatmap; give the lower panel the same width so the time axes line up.
    fig.colorbar(mesh, ax=bottom, pad=0.01).ax.set_visible(False)
    fig.tight_layout()
    return fig


__all__ = ["PAPER", "INK", "SIGNAL", "GOAL", "FAINT", "COLOURS", "style", "save", "trajectory_figure",
           "profile_figure"]
