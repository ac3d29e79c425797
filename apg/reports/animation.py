"""GIF animations of one closed-loop episode, drawn in the project's own look from each system's sketch.

The look: warm paper background, ink-coloured mechanism, one signal colour for whatever the controller drives
(with an arrow or arc sized by the action as a fraction of its range), teal for the goal, a fading trace of
the part that matters, and a gauge per action along the bottom. What to draw comes from the system itself
(:meth:`envs.base.System.sketch`, plain shapes in metres); this module only turns those shapes into pixels, so
a new system needs nothing here.
"""

from __future__ import annotations

import math
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np
from matplotlib.animation import FuncAnimation, PillowWriter
from matplotlib.axes import Axes
from matplotlib.patches import Arc, Circle, FancyArrowPatch, Polygon

from apg.reports.figures import FAINT, GOAL, INK, PAPER, SIGNAL
from envs import sketch as sk
from envs.base import System

# Fill colour per role; lines and outlines take _LINE (a "hollow" part is ink on paper).
_FILL = {"body": INK, "hollow": PAPER, "accent": SIGNAL, "goal": GOAL, "limit": SIGNAL, "support": FAINT,
         "detail": PAPER}
_LINE = {**_FILL, "hollow": INK}
_OUTLINE_PT = 1.5  # edge width of hollow parts and rings, in points (a line weight, not a size in the plane)


def _points_per_metre(ax: Axes, bounds: tuple[float, float, float, float]) -> float:
    """Line widths are in points, sketch widths in metres: the scale of the equal-aspect view."""
    x0, x1, y0, y1 = bounds
    box = ax.get_position()
    w_pt = box.width * ax.figure.get_figwidth() * 72
    h_pt = box.height * ax.figure.get_figheight() * 72
    return min(w_pt / (x1 - x0), h_pt / (y1 - y0))


def _ground(ax: Axes, g: sk.Ground, z: int) -> None:
    ax.plot([g.x0, g.x1], [g.y, g.y], color=INK, lw=1.5, zorder=z)
    tick = 0.02 * (g.x1 - g.x0)
    for xs in np.linspace(g.x0, g.x1, 40):
        ax.plot([xs, xs - tick], [g.y, g.y - tick], color=FAINT, lw=0.8, zorder=z - 0.5)


def _push(ax: Axes, p: sk.Push, frac: float, share: float, z: int) -> None:
    dx, dy = p.direction
    if p.one_sided:
        start, length = p.at, p.base + p.length * share
    else:
        if abs(frac) < 1e-3:
            return
        side = math.copysign(p.clearance, frac)
        start, length = (p.at[0] + side * dx, p.at[1] + side * dy), frac * p.length
    tip = (start[0] + length * dx, start[1] + length * dy)
    ax.add_patch(FancyArrowPatch(start, tip, arrowstyle="-|>", mutation_scale=14 if not p.one_sided else 10,
                                 color=SIGNAL, lw=2.2 if not p.one_sided else 1.8, zorder=z))


def _twist(ax: Axes, t: sk.Twist, frac: float, z: int) -> None:
    if abs(frac) < 1e-3:
        return
    span = 300 * abs(frac)
    start = 90 - span / 2
    (x, y), r = t.centre, t.radius
    ax.add_patch(Arc((x, y), 2 * r, 2 * r, theta1=start, theta2=start + span, color=SIGNAL, lw=2.5, zorder=z))
    end = math.radians(start + span if frac > 0 else start)
    ax.add_patch(Circle((x + r * math.cos(end), y + r * math.sin(end)), 0.08 * r, color=SIGNAL, zorder=z))


def draw_sketch(ax: Axes, shapes: list, fracs: np.ndarray, trail: np.ndarray, pt_per_m: float) -> None:
    """Draw one state's sketch on ``ax``, later shapes on top of earlier ones.

    Args:
        fracs: ``(action_dim,)`` each action as a fraction of its range, in [-1, 1].
        trail: ``(k, 2)`` recent positions of the sketch's :class:`~envs.sketch.Trace` point (m), oldest first.
    """
    for z, s in enumerate(shapes, start=2):
        if isinstance(s, sk.Segment):
            ax.plot([s.start[0], s.end[0]], [s.start[1], s.end[1]], color=_LINE[s.role],
                    lw=max(0.5, s.width * pt_per_m), ls="--" if s.dashed else "-", solid_capstyle="round", zorder=z)
        elif isinstance(s, sk.Disc):
            if s.filled and s.role == "hollow":
                ax.add_patch(Circle(s.centre, s.radius, fc=PAPER, ec=INK, lw=_OUTLINE_PT, zorder=z))
            elif s.filled:
                ax.add_patch(Circle(s.centre, s.radius, color=_FILL[s.role], zorder=z))
            else:
                ax.add_patch(Circle(s.centre, s.radius, fill=False, ec=_LINE[s.role],
                                    lw=_OUTLINE_PT, ls="--" if s.dashed else "-", zorder=z))
        elif isinstance(s, sk.Box):
            edge = INK if s.role == "body" else _LINE[s.role]
            ax.add_patch(Polygon(s.corners, closed=True, fc=_FILL[s.role], ec=edge,
                                 lw=2 if s.role == "hollow" else 0.5, zorder=z))
        elif isinstance(s, sk.Polygon):
            ax.add_patch(Polygon(s.points, closed=True, color=_FILL[s.role], zorder=z))
        elif isinstance(s, sk.Ground):
            _ground(ax, s, z)
        elif isinstance(s, sk.Push):
            i = s.action
            _push(ax, s, float(fracs[i]), float((fracs[i] + 1) / 2), z + 100)  # actuators above the mechanism
        elif isinstance(s, sk.Twist):
            _twist(ax, s, float(fracs[s.action]), z + 100)
        elif isinstance(s, sk.Trace):
            if len(trail) >= 2:
                alpha = np.linspace(0.05, 0.6, len(trail))
                ax.scatter(trail[:, 0], trail[:, 1], s=6, color=SIGNAL, alpha=alpha, lw=0, zorder=z)
        else:
            raise TypeError(f"cannot draw a {type(s).__name__}; a sketch holds only "
                            f"{', '.join(c.__name__ for c in sk.PRIMITIVES)}")


def _trace_points(shapes: list[list]) -> np.ndarray:
    """``(T+1, 2)`` the Trace point of every state's sketch (NaN where a sketch has none)."""
    out = np.full((len(shapes), 2), np.nan)
    for k, sketch in enumerate(shapes):
        for s in sketch:
            if isinstance(s, sk.Trace):
                out[k] = s.point
    return out


def animate(system: System, states: np.ndarray, actions: np.ndarray, path: Path | str, *, fps: int = 15,
            max_frames: int = 120, title: str = "", trail_seconds: float = 2.0) -> Path:
    """Write a GIF of one episode.

    Args:
        states: ``(T+1, state_dim)`` true states; ``actions`` ``(T, action_dim)`` the actions applied.
        max_frames: the episode is subsampled evenly to at most this many frames.

    Raises:
        ValueError: arrays of the wrong shape, or a view of no size.
    """
    states, actions = np.asarray(states, dtype=float), np.asarray(actions, dtype=float)
    if states.ndim != 2 or states.shape[1] != system.state_dim or actions.shape != (len(states) - 1, system.action_dim):
        raise ValueError(f"animate needs states (T+1, {system.state_dim}) and actions (T, {system.action_dim}); got "
                         f"{states.shape} and {actions.shape}")
    lo, hi = np.array(system.action_low), np.array(system.action_high)
    fracs = 2 * (actions - lo) / (hi - lo) - 1  # (T, m) in [-1, 1]
    fracs = np.concatenate([fracs, fracs[-1:]])  # hold the last action on the final state
    frames = np.unique(np.linspace(0, len(states) - 1, min(max_frames, len(states))).round().astype(int))
    trail_steps = max(1, int(trail_seconds / system.dt))
    rows = states.tolist()
    sketches = [system.sketch(x) for x in rows]
    trace = _trace_points(sketches)
    bounds = tuple(float(v) for v in system.sketch_bounds(rows))
    x0, x1, y0, y1 = bounds
    if not (x1 > x0 and y1 > y0 and all(math.isfinite(v) for v in bounds)):
        raise ValueError(f"{system.name}.sketch_bounds must give finite (x_low, x_high, y_low, y_high) with "
                         f"low < high, got {bounds}")
    width = 6.4
    height = float(np.clip(width * (y1 - y0) / (x1 - x0), 3.0, 6.4)) + 0.9
    fig = plt.figure(figsize=(width, height), facecolor=PAPER)
    ax = fig.add_axes((0.04, 0.9 / height + 0.02, 0.92, 1 - (0.9 / height + 0.02) - 0.08))
    gauge = fig.add_axes((0.2, 0.12 / height, 0.6, 0.55 / height))

    def frame(k: int) -> None:
        ax.clear()
        ax.set_facecolor(PAPER)
        ax.set_xlim(x0, x1)
        ax.set_ylim(y0, y1)
        ax.set_aspect("equal", adjustable="box")
        ax.axis("off")
        ax.apply_aspect()  # the equal-aspect box is final now, so the metre-to-point scale is right
        trail = trace[max(0, k - trail_steps): k + 1]
        draw_sketch(ax, sketches[k], fracs[k], trail[~np.isnan(trail).any(axis=1)], _points_per_metre(ax, bounds))
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


__all__ = ["animate", "draw_sketch"]
