"""GIF animations of one closed-loop episode, drawn with matplotlib (Agg) in the project's own look.

The look: warm paper background, ink-coloured mechanism, one signal colour for whatever the controller drives
(with an arrow or arc sized by the action as a fraction of its range), teal for the goal, a fading trace of
the part that matters, and a gauge per action along the bottom. One drawing function per system lives in
:data:`DRAWERS`; a new system adds one.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Callable

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.animation import FuncAnimation, PillowWriter  # noqa: E402
from matplotlib.axes import Axes  # noqa: E402
from matplotlib.patches import Arc, Circle, FancyArrowPatch, Polygon, Rectangle  # noqa: E402

from envs.base import System  # noqa: E402

PAPER = "#f3ede2"
INK = "#27303f"
SIGNAL = "#d2492a"
GOAL = "#1f8a70"
FAINT = "#b9ae9c"

Drawer = Callable[[Axes, System, np.ndarray, np.ndarray, np.ndarray], None]


def _val(v: object) -> float:
    return float(np.mean(np.asarray(v, dtype=float)))


def _ground(ax: Axes, x0: float, x1: float, y: float) -> None:
    ax.plot([x0, x1], [y, y], color=INK, lw=1.5, zorder=1)
    for xs in np.linspace(x0, x1, 40):
        ax.plot([xs, xs - 0.02 * (x1 - x0)], [y, y - 0.02 * (x1 - x0)], color=FAINT, lw=0.8, zorder=0)


def _push_arrow(ax: Axes, x: float, y: float, frac: float, length: float) -> None:
    if abs(frac) < 1e-3:
        return
    ax.add_patch(FancyArrowPatch((x, y), (x + frac * length, y), arrowstyle="-|>", mutation_scale=14, color=SIGNAL,
                                 lw=2.2, zorder=6))


def _torque_arc(ax: Axes, x: float, y: float, frac: float, radius: float) -> None:
    if abs(frac) < 1e-3:
        return
    span = 300 * abs(frac)
    start = 90 - span / 2
    ax.add_patch(Arc((x, y), 2 * radius, 2 * radius, theta1=start, theta2=start + span, color=SIGNAL, lw=2.5,
                     zorder=6))
    end = math.radians(start + span if frac > 0 else start)
    tip = (x + radius * math.cos(end), y + radius * math.sin(end))
    ax.add_patch(Circle(tip, 0.08 * radius, color=SIGNAL, zorder=6))


def _pendulum(ax: Axes, s: System, x: np.ndarray, frac: np.ndarray, trail: np.ndarray) -> None:
    length = _val(s.params.length)
    tips = np.stack([length * np.sin(trail[:, 0]), length * np.cos(trail[:, 0])], 1)
    ax.add_patch(Circle((0, length), 0.06 * length, fill=False, ec=GOAL, lw=1.5, ls="--"))
    _trace(ax, tips)
    tip = tips[-1]
    ax.plot([0, tip[0]], [0, tip[1]], color=INK, lw=3, solid_capstyle="round", zorder=4)
    ax.add_patch(Circle(tuple(tip), 0.09 * length, color=INK, zorder=5))
    ax.add_patch(Circle((0, 0), 0.04 * length, color=PAPER, ec=INK, lw=1.5, zorder=5))
    _torque_arc(ax, 0, 0, float(frac[0]), 0.25 * length)


def _cartpole(ax: Axes, s: System, x: np.ndarray, frac: np.ndarray, trail: np.ndarray) -> None:
    pole = 2 * _val(s.params.half_length)
    w, h = 0.5, 0.25
    limit = s.task.track_limit
    _ground(ax, -limit - 0.4, limit + 0.4, -h / 2 - 0.05)
    for edge in (-limit, limit):
        ax.plot([edge, edge], [-h / 2 - 0.05, h], color=SIGNAL, lw=1, ls=":")
    ax.plot([0, 0], [-h / 2 - 0.05, -h / 2 - 0.12], color=GOAL, lw=2)
    tips = np.stack([trail[:, 0] + pole * np.sin(trail[:, 1]), pole * np.cos(trail[:, 1])], 1)
    _trace(ax, tips)
    cx = x[0]
    ax.add_patch(Rectangle((cx - w / 2, -h / 2), w, h, fc=PAPER, ec=INK, lw=2, zorder=4))
    ax.plot([cx, tips[-1, 0]], [0, tips[-1, 1]], color=INK, lw=3.5, solid_capstyle="round", zorder=5)
    ax.add_patch(Circle((cx, 0), 0.04, color=INK, zorder=6))
    _push_arrow(ax, cx + np.sign(frac[0]) * w / 2, 0, float(frac[0]), 0.8)


def _acrobot(ax: Axes, s: System, x: np.ndarray, frac: np.ndarray, trail: np.ndarray) -> None:
    l1, l2 = _val(s.params.link_length_1), _val(s.params.link_length_2)
    goal = s.task.goal_height
    ax.plot([-(l1 + l2), l1 + l2], [goal, goal], color=GOAL, lw=1.5, ls="--")

    def joints(q: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        p1 = np.stack([l1 * np.sin(q[..., 0]), -l1 * np.cos(q[..., 0])], -1)
        p2 = p1 + np.stack([l2 * np.sin(q[..., 0] + q[..., 1]), -l2 * np.cos(q[..., 0] + q[..., 1])], -1)
        return p1, p2

    _, tips = joints(trail)
    _trace(ax, tips)
    p1, p2 = joints(x)
    ax.plot([0, p1[0]], [0, p1[1]], color=INK, lw=4, solid_capstyle="round", zorder=4)
    ax.plot([p1[0], p2[0]], [p1[1], p2[1]], color=INK, lw=4, solid_capstyle="round", zorder=4)
    ax.add_patch(Circle((0, 0), 0.05, color=PAPER, ec=INK, lw=1.5, zorder=5))
    ax.add_patch(Circle(tuple(p1), 0.05, color=SIGNAL, zorder=5))
    _torque_arc(ax, p1[0], p1[1], float(frac[0]), 0.25)


def _crane(ax: Axes, s: System, x: np.ndarray, frac: np.ndarray, trail: np.ndarray) -> None:
    rope = _val(s.params.rope_length)
    d = s.task.distance
    ax.plot([-2.5, d + 2.5], [0.3, 0.3], color=INK, lw=4, zorder=2)  # the rail
    for post in (-2.5, d + 2.5):
        ax.plot([post, post], [0.3, -rope - 2.5], color=FAINT, lw=3, zorder=0)
    _ground(ax, -2.5, d + 2.5, -rope - 2.5)
    ax.add_patch(Polygon([(d - 0.4, -rope - 2.5), (d + 0.4, -rope - 2.5), (d, -rope - 1.9)], color=GOAL, zorder=1))
    loads = np.stack([trail[:, 0] + rope * np.sin(trail[:, 1]), -rope * np.cos(trail[:, 1])], 1)
    _trace(ax, loads)
    tx = x[0]
    load = loads[-1]
    ax.add_patch(Rectangle((tx - 0.8, 0.05), 1.6, 0.5, fc=PAPER, ec=INK, lw=2, zorder=4))
    ax.plot([tx, load[0]], [0.05, load[1]], color=INK, lw=1.2, zorder=3)
    ax.add_patch(Rectangle((load[0] - 1.2, load[1] - 1.2), 2.4, 1.2, fc=INK, ec=INK, zorder=4))
    for k in range(1, 6):  # corrugations: a container, not a block
        xs = load[0] - 1.2 + 0.4 * k
        ax.plot([xs, xs], [load[1] - 1.1, load[1] - 0.1], color=PAPER, lw=0.7, zorder=5)
    _push_arrow(ax, tx + np.sign(frac[0]) * 0.8, 0.3, float(frac[0]), 3.0)


def _quadrotor(ax: Axes, s: System, x: np.ndarray, frac: np.ndarray, trail: np.ndarray) -> None:
    arm = 2 * _val(s.params.arm_length)  # drawn at twice the true size so the craft reads at this zoom
    tx, tz = s.task.target
    _ground(ax, tx - 3, tx + 3, 0)
    ax.add_patch(Rectangle((tx - 0.35, 0), 0.7, 0.05, color=GOAL, zorder=2))
    ax.plot([tx], [tz], marker="+", ms=14, mew=2, color=GOAL)
    _trace(ax, trail[:, :2])
    cx, cz, th = x[0], x[1], x[2]
    axis = np.array([math.cos(th), math.sin(th)])
    normal = np.array([-math.sin(th), math.cos(th)])
    left, right = np.array([cx, cz]) - arm * axis, np.array([cx, cz]) + arm * axis
    ax.plot([left[0], right[0]], [left[1], right[1]], color=INK, lw=3.5, solid_capstyle="round", zorder=4)
    ax.add_patch(Circle((cx, cz), 0.3 * arm, color=INK, zorder=5))
    for rotor, f in ((left, frac[0]), (right, frac[1])):
        ax.plot(*np.stack([rotor - 0.35 * arm * axis, rotor + 0.35 * arm * axis], 1), color=INK, lw=2, zorder=5)
        tip = rotor + normal * (0.1 + 0.7 * (f + 1) / 2)
        ax.add_patch(FancyArrowPatch(tuple(rotor), tuple(tip), arrowstyle="-|>", mutation_scale=10, color=SIGNAL,
                                     lw=1.8, zorder=6))


def _double_integrator(ax: Axes, s: System, x: np.ndarray, frac: np.ndarray, trail: np.ndarray) -> None:
    _ground(ax, -3, 3, -0.15)
    ax.plot([0, 0], [-0.15, -0.3], color=GOAL, lw=2)
    ax.add_patch(Rectangle((x[0] - 0.2, -0.15), 0.4, 0.3, fc=PAPER, ec=INK, lw=2, zorder=4))
    _push_arrow(ax, x[0] + np.sign(frac[0]) * 0.2, 0, float(frac[0]), 1.0)


def _trace(ax: Axes, points: np.ndarray) -> None:
    if len(points) < 2:
        return
    alpha = np.linspace(0.05, 0.6, len(points))
    ax.scatter(points[:, 0], points[:, 1], s=6, color=SIGNAL, alpha=alpha, lw=0, zorder=3)


DRAWERS: dict[str, Drawer] = {"pendulum": _pendulum, "cartpole": _cartpole, "acrobot": _acrobot, "crane": _crane,
                              "quadrotor": _quadrotor, "double_integrator": _double_integrator}


def _extent(system: System, states: np.ndarray) -> tuple[float, float, float, float]:
    name, p = system.name, system.params
    if name == "pendulum":
        r = 1.25 * _val(p.length)
        return (-r, r, -r, r)
    if name == "cartpole":
        lim = system.task.track_limit + 0.5
        return (-lim, lim, -0.6, 2 * _val(p.half_length) + 0.4)
    if name == "acrobot":
        r = 1.15 * (_val(p.link_length_1) + _val(p.link_length_2))
        return (-r, r, -r, r)
    if name == "crane":
        return (-3.0, system.task.distance + 3.0, -_val(p.rope_length) - 3.0, 1.5)
    if name == "quadrotor":
        tx, tz = system.task.target
        xs, zs = states[:, 0], states[:, 1]
        lo_x, hi_x = min(xs.min(), tx) - 0.6, max(xs.max(), tx) + 0.6
        hi_z = max(zs.max(), tz) + 0.6
        return (lo_x, hi_x, -0.3, hi_z)
    lim = max(3.0, float(np.abs(states[:, 0]).max()) + 0.5)
    return (-lim, lim, -1.0, 1.0)


def animate(system: System, states: np.ndarray, actions: np.ndarray, path: Path | str, *, fps: int = 15,
            max_frames: int = 120, title: str = "", trail_seconds: float = 2.0) -> Path:
    """Write a GIF of one episode.

    Args:
        states: ``(T+1, state_dim)`` true states; ``actions`` ``(T, action_dim)`` the actions applied.
        max_frames: the episode is subsampled evenly to at most this many frames.

    Raises:
        ValueError: a system without a drawing function, or arrays of the wrong shape.
    """
    if system.name not in DRAWERS:
        raise ValueError(f"no animation for system {system.name!r}; drawable systems are {sorted(DRAWERS)}")
    states, actions = np.asarray(states, dtype=float), np.asarray(actions, dtype=float)
    if states.ndim != 2 or states.shape[1] != system.state_dim or actions.shape != (len(states) - 1, system.action_dim):
        raise ValueError(f"animate needs states (T+1, {system.state_dim}) and actions (T, {system.action_dim}); got "
                         f"{states.shape} and {actions.shape}")
    lo, hi = np.array(system.action_low), np.array(system.action_high)
    fracs = 2 * (actions - lo) / (hi - lo) - 1  # (T, m) in [-1, 1]
    fracs = np.concatenate([fracs, fracs[-1:]])  # hold the last action on the final state
    frames = np.unique(np.linspace(0, len(states) - 1, min(max_frames, len(states))).round().astype(int))
    trail_steps = max(1, int(trail_seconds / system.dt))
    x0, x1, y0, y1 = _extent(system, states)
    width = 6.4
    height = float(np.clip(width * (y1 - y0) / (x1 - x0), 3.0, 6.4)) + 0.9
    fig = plt.figure(figsize=(width, height), facecolor=PAPER)
    ax = fig.add_axes((0.04, 0.9 / height + 0.02, 0.92, 1 - (0.9 / height + 0.02) - 0.08))
    gauge = fig.add_axes((0.2, 0.12 / height, 0.6, 0.55 / height))
    draw = DRAWERS[system.name]

    def frame(k: int) -> None:
        ax.clear()
        ax.set_facecolor(PAPER)
        ax.set_xlim(x0, x1)
        ax.set_ylim(y0, y1)
        ax.set_aspect("equal", adjustable="box")
        ax.axis("off")
        draw(ax, system, states[k], fracs[k], states[max(0, k - trail_steps): k + 1])
        ax.text(0.0, 1.0, f"{title or system.name}   t = {k * system.dt:5.2f} s", transform=ax.transAxes,
                ha="left", va="bottom", color=INK, fontsize=9, family="monospace")
        gauge.clear()
        gauge.set_facecolor(PAPER)
        m = system.action_dim
        for i in range(m):
            row = m - 1 - i  # first action on top
            gauge.barh(row, 2, left=-1, color=FAINT, height=0.5)
            gauge.barh(row, fracs[k, i], color=SIGNAL, height=0.5)
            gauge.text(-1.04, row, system.action[i].name, ha="right", va="center", fontsize=7, color=INK)
            gauge.text(1.04, row, f"{actions[min(k, len(actions) - 1), i]:.3g} {system.action[i].unit}", ha="left",
                       va="center", fontsize=7, color=INK, family="monospace")
        gauge.axvline(0, color=INK, lw=0.8)
        gauge.set_xlim(-1, 1)
        gauge.set_ylim(-0.5, m - 0.5)
        gauge.axis("off")

    anim = FuncAnimation(fig, frame, frames=frames, interval=1000 / fps)
    path = Path(path)
    anim.save(str(path), writer=PillowWriter(fps=fps), savefig_kwargs={"facecolor": PAPER})
    plt.close(fig)
    return path


__all__ = ["animate", "DRAWERS"]
