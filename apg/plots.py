"""Matplotlib figures of held-out trajectories (Agg backend: no display needed)."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from apg.rollout import Trajectory  # noqa: E402
from envs.base import System  # noqa: E402


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
            style = "-" if ok is None or ok[j] else "--"
            ax.plot(time, values[:, j], style, color=colours[j], lw=1.2)
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
