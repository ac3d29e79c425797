"""Plain numeric shapes a system describes itself with, for drawing one state in the plane.

A system's :meth:`~envs.base.System.sketch` returns a list of these records, all lengths in metres in the
system's own plane (``x`` to the right, ``y`` up). They say what is where and what part it plays (its ``role``);
how a role looks (colours, hatching, line styles) is the drawing code's business (:mod:`apg.reports.animation`),
so the simulators stay free of any plotting library.

Roles: ``body`` the moving mechanism (solid), ``hollow`` a part drawn as an outline on the background (a cart, a
pivot), ``accent`` a part the controller drives directly (a motorised joint), ``goal`` where the task wants the
machine, ``limit`` a boundary the machine must stay within, ``support`` fixed structure (posts, rails' legs),
``detail`` light markings drawn on top of a body.

Actuators are drawn sized by the action they carry: :class:`Push` (a force arrow) and :class:`Twist` (a torque
arc) name the index of their action, and the drawing code scales them by that action as a fraction of its range.
:class:`Trace` marks the point whose recent path is drawn as a fading trail.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable, Union

ROLES = ("body", "hollow", "accent", "goal", "limit", "support", "detail")
Point = tuple[float, float]


def _check(kind: str, role: str, **sizes: float) -> None:
    if role not in ROLES:
        raise ValueError(f"{kind}.role must be one of {', '.join(ROLES)}; got {role!r}")
    for name, v in sizes.items():
        if not (math.isfinite(v) and v >= 0):
            raise ValueError(f"{kind}.{name} must be a finite length >= 0 m, got {v}")


@dataclass(frozen=True)
class Segment:
    """A straight bar or line from ``start`` to ``end`` (m), ``width`` thick (m), round ends."""

    start: Point
    end: Point
    width: float  # m
    role: str = "body"
    dashed: bool = False

    def __post_init__(self) -> None:
        _check("Segment", self.role, width=self.width)


@dataclass(frozen=True)
class Disc:
    """A disc (``filled``) or a ring of radius ``radius`` (m) about ``centre`` (m)."""

    centre: Point
    radius: float  # m
    role: str = "body"
    filled: bool = True
    dashed: bool = False

    def __post_init__(self) -> None:
        _check("Disc", self.role, radius=self.radius)


@dataclass(frozen=True)
class Box:
    """A rectangle ``width`` x ``height`` (m) centred on ``centre`` (m), turned by ``angle`` (rad, anticlockwise)."""

    centre: Point
    width: float  # m
    height: float  # m
    angle: float = 0.0  # rad
    role: str = "hollow"

    def __post_init__(self) -> None:
        _check("Box", self.role, width=self.width, height=self.height)

    @property
    def corners(self) -> tuple[Point, Point, Point, Point]:
        """The four corners (m), anticlockwise from the lower left of the unturned box."""
        c, s = math.cos(self.angle), math.sin(self.angle)
        out = []
        for dx, dy in ((-1, -1), (1, -1), (1, 1), (-1, 1)):
            hx, hy = dx * self.width / 2, dy * self.height / 2
            out.append((self.centre[0] + c * hx - s * hy, self.centre[1] + s * hx + c * hy))
        return tuple(out)  # type: ignore[return-value]


@dataclass(frozen=True)
class Polygon:
    """A filled polygon through ``points`` (m)."""

    points: tuple[Point, ...]
    role: str = "goal"

    def __post_init__(self) -> None:
        _check("Polygon", self.role)
        if len(self.points) < 3:
            raise ValueError(f"Polygon.points needs at least 3 points, got {len(self.points)}")


@dataclass(frozen=True)
class Ground:
    """The floor (or a fixed base) from ``x0`` to ``x1`` at height ``y`` (m); drawn with hatching below."""

    x0: float  # m
    x1: float  # m
    y: float  # m


@dataclass(frozen=True)
class Push:
    """A force actuator: an arrow along the unit vector ``direction`` from ``at`` (m), ``length`` (m) at full action.

    Two-sided (``one_sided=False``): the arrow points along ``direction`` times the sign of the action's fraction
    of its range in [-1, 1], starting ``clearance`` (m) from ``at`` on that side. One-sided (a thrust that only
    pushes): its length is ``base + length * share``, ``share`` in [0, 1] the action's share of its range.
    """

    at: Point
    direction: Point  # unit vector
    length: float  # m at full action
    action: int  # index into the system's actions
    clearance: float = 0.0  # m
    one_sided: bool = False
    base: float = 0.0  # m, one-sided only

    def __post_init__(self) -> None:
        _check("Push", "body", length=self.length, clearance=self.clearance, base=self.base)
        if abs(math.hypot(*self.direction) - 1.0) > 1e-6:
            raise ValueError(f"Push.direction must be a unit vector, got {self.direction}")


@dataclass(frozen=True)
class Twist:
    """A torque actuator: an arc of radius ``radius`` (m) about ``centre`` (m), swept by the action's fraction."""

    centre: Point
    radius: float  # m
    action: int  # index into the system's actions

    def __post_init__(self) -> None:
        _check("Twist", "body", radius=self.radius)


@dataclass(frozen=True)
class Trace:
    """The point (m) whose recent path is drawn as a fading trail (at most one per sketch)."""

    point: Point


Primitive = Union[Segment, Disc, Box, Polygon, Ground, Push, Twist, Trace]
PRIMITIVES = (Segment, Disc, Box, Polygon, Ground, Push, Twist, Trace)


def extent(primitives: Iterable[Primitive]) -> tuple[float, float, float, float]:
    """``(x_low, x_high, y_low, y_high)`` (m) covering every shape (actuator arrows at full length included).

    Raises:
        ValueError: no primitive with a position.
    """
    xs: list[float] = []
    ys: list[float] = []
    for p in primitives:
        if isinstance(p, Segment):
            pts, pad = [p.start, p.end], p.width / 2
        elif isinstance(p, (Disc, Twist)):
            pts, pad = [p.centre], p.radius
        elif isinstance(p, Box):
            pts, pad = list(p.corners), 0.0
        elif isinstance(p, Polygon):
            pts, pad = list(p.points), 0.0
        elif isinstance(p, Ground):
            pts, pad = [(p.x0, p.y), (p.x1, p.y)], 0.0
        elif isinstance(p, Push):
            reach = p.clearance + p.base + p.length
            pts = [(p.at[0] + s * reach * p.direction[0], p.at[1] + s * reach * p.direction[1]) for s in (-1, 1)]
            pad = 0.0
        elif isinstance(p, Trace):
            pts, pad = [p.point], 0.0
        else:
            raise TypeError(f"sketch primitives must be one of {', '.join(c.__name__ for c in PRIMITIVES)}; got "
                            f"{type(p).__name__}")
        xs += [x + s * pad for x, _ in pts for s in (-1, 1)]
        ys += [y + s * pad for _, y in pts for s in (-1, 1)]
    if not xs:
        raise ValueError("extent needs at least one primitive with a position")
    return (min(xs), max(xs), min(ys), max(ys))


__all__ = ["ROLES", "Segment", "Disc", "Box", "Polygon", "Ground", "Push", "Twist", "Trace", "Primitive",
           "PRIMITIVES", "extent"]
