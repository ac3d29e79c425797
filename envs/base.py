"""The system interface every simulator implements, and the small records it is built from.

A system is a planar mechanism with generalised coordinates ``q`` and velocities ``qd``; its state is
``x = [q, qd]`` with shape ``(B, 2 * n_q)``. Subclasses supply the continuous-time acceleration
``qdd = f(q, qd, u)``; the shared integrators in :mod:`envs.integrators` turn it into a discrete step.
Everything here is pure torch: no step mutates its inputs, prints or logs.
"""

from __future__ import annotations

import abc
import dataclasses
import math
from dataclasses import dataclass
from typing import Any, ClassVar, Mapping, Sequence

import torch
from torch import Tensor

from envs.integrators import INTEGRATORS, integrator_step
from envs.sketch import Primitive, extent


@dataclass(frozen=True)
class Quantity:
    """One named entry of a state or action vector."""

    name: str
    unit: str
    angle: bool = False  # angles are observed as (sin, cos) so the policy sees no wrap-around


def _is_number(v: object) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def check_record(record: object, positive: tuple[str, ...] = (), nonnegative: tuple[str, ...] = ()) -> None:
    """Validate a parameter record once, at the door.

    Every field must be finite (a Python number or a tensor of per-batch values). A field declared with
    ``positive=True`` (see :func:`unit` and :func:`bounded`) must be > 0, one declared ``nonnegative=True``
    >= 0. The ``positive`` and ``nonnegative`` tuples of field names add to the declarations (the older way
    of stating bounds, still accepted). Raises ``ValueError`` naming the field, its bound, unit and value.
    """
    for f in dataclasses.fields(record):  # type: ignore[arg-type]
        v = getattr(record, f.name)
        if isinstance(v, Tensor):
            vals = v.detach()
        elif _is_number(v):
            vals = torch.tensor(float(v))
        elif isinstance(v, tuple) and all(_is_number(e) for e in v):
            vals = torch.tensor([float(e) for e in v]) if v else torch.zeros(0)
        elif _is_number(f.default):
            raise ValueError(f"{f.name} must be a number or a tensor of per-batch values, got {v!r}")
        else:
            continue
        unit = f.metadata.get("unit", "")
        bound = f.metadata.get("bound")
        shown = v.tolist() if isinstance(v, Tensor) else v
        if not torch.isfinite(vals).all():
            raise ValueError(f"{f.name} must be finite, got {shown}")
        if (bound == "positive" or f.name in positive) and not (vals > 0).all():
            raise ValueError(f"{f.name} must be > 0 {unit}".rstrip() + f", got {shown}")
        if (bound == "nonnegative" or f.name in nonnegative) and not (vals >= 0).all():
            raise ValueError(f"{f.name} must be >= 0 {unit}".rstrip() + f", got {shown}")


def make_record(cls: type, values: Mapping[str, Any] | None, what: str) -> Any:
    """Build the frozen record ``cls`` from a plain mapping (lists become tuples).

    Raises ``ValueError`` for an unknown key (listing the valid ones) or a value out of range, the message
    prefixed with ``what`` (for example ``system.params``) so it names the offending config key.
    """
    values = dict(values or {})
    known = [f.name for f in dataclasses.fields(cls)]
    unknown = sorted(set(values) - set(known))
    if unknown:
        raise ValueError(f"unknown {what} key(s) {unknown}; valid keys are {known}")
    values = {k: tuple(v) if isinstance(v, list) else v for k, v in values.items()}
    try:
        return cls(**values)
    except (ValueError, TypeError) as e:
        raise ValueError(f"{what}.{e}") from None


def unit(u: str, default: object, *, positive: bool = False, nonnegative: bool = False) -> Any:
    """A dataclass field with its unit, and optionally its sign bound, in the metadata.

    The unit appears in error messages and documentation; :func:`check_record` enforces the bound
    (``positive``: > 0, ``nonnegative``: >= 0), so each field states its range once, where it is declared.
    """
    return _declared(default, u, positive, nonnegative)


def bounded(default: object, *, positive: bool = False, nonnegative: bool = False) -> Any:
    """A dimensionless field (a weight, a count, a ratio) with a sign bound that :func:`check_record` enforces."""
    if not (positive or nonnegative):
        raise TypeError("bounded() needs positive=True or nonnegative=True; use a plain default for an unbounded field")
    return _declared(default, "", positive, nonnegative)


def _declared(default: object, u: str, positive: bool, nonnegative: bool) -> Any:
    if positive and nonnegative:
        raise TypeError("a field is either positive=True or nonnegative=True, not both (positive implies >= 0)")
    metadata: dict[str, str] = {"unit": u}
    if positive or nonnegative:
        metadata["bound"] = "positive" if positive else "nonnegative"
    return dataclasses.field(default=default, metadata=metadata)


def wrap_angle(a: Tensor) -> Tensor:
    """Map an angle to (-pi, pi]; smooth almost everywhere, so fine inside a cost."""
    return torch.atan2(torch.sin(a), torch.cos(a))


def box_sample(low: tuple[float, ...], high: tuple[float, ...], n: int, generator: torch.Generator,
               dtype: torch.dtype) -> Tensor:
    """Uniform samples from an axis-aligned box, shape ``(n, len(low))``."""
    lo = torch.tensor(low, dtype=dtype)
    hi = torch.tensor(high, dtype=dtype)
    r = torch.rand(n, len(low), generator=generator, dtype=dtype)
    return lo + (hi - lo) * r


class System(abc.ABC):
    """A deterministic, differentiable planar system with its task.

    Contract (shapes use ``B`` for the batch):

    * ``step(x, u) -> x_next``: ``x`` is ``(B, state_dim)``, ``u`` is ``(B, action_dim)``; float32 or float64;
      differentiable in ``x``, ``u`` and tensor-valued parameters.
    * ``observe(x) -> (B, obs_dim)``: angles as ``(sin, cos)``, other entries as they are.
    * ``running_cost(x, u) -> (B,)`` per step and ``terminal_cost(x) -> (B,)`` at the end of the horizon.
      One convention for every system: the running cost is ``(stage_cost(x) + effort_cost(u)) * dt``, a
      rectangle-rule quadrature of a cost rate, so the total cost of a horizon hardly depends on ``dt``; the
      terminal cost is by default the stage cost with weight 1 (as if the final state were held for one second).
      Subclasses implement ``stage_cost`` and ``effort_cost`` and override ``terminal_cost`` only where it
      differs (a Riccati cost-to-go, extra terminal weights).
    * ``sample_initial(n, generator) -> (n, state_dim)``: the task's initial-state distribution.
    * ``success(states, actions) -> (B,) bool`` on a whole trajectory (``states`` is ``(T+1, B, state_dim)``).
    * ``action_low`` / ``action_high``: per-action limits in the action's unit.

    Parameters live in ``self.params`` (a frozen record of the subclass's ``Params`` type); any field may be a
    tensor of shape ``(B,)`` to simulate a different model per batch element.

    What deployment tools need to know about a system lives on it too, so adding a system is one module:

    * ``state_limits``: ``{state name: (low, high)}`` in the state's unit, the envelope whose violation
      apg-eval counts (where the task sets it, derived from the task);
    * ``robustness_params``: the ``Params`` fields a robustness sweep varies by default (model error a real
      machine has: masses, lengths, stiffnesses; not gravity or actuator limits);
    * ``sketch(x)`` and ``sketch_bounds(states)``: the machine's shape for one state as the plain records of
      :mod:`envs.sketch` (metres), and the view that holds a whole episode.
    """

    name: ClassVar[str]
    state: ClassVar[tuple[Quantity, ...]]
    action: ClassVar[tuple[Quantity, ...]]
    Params: ClassVar[type]
    Task: ClassVar[type]
    default_dt: ClassVar[float]
    action_limits: ClassVar[tuple[str, ...]]  # for each action, the Params field that bounds it (in its unit)
    one_sided: ClassVar[bool] = False  # actions range over [0, limit] (thrusts) instead of [-limit, limit]
    robustness_params: ClassVar[tuple[str, ...]]

    def __init__(self, params: object | None = None, task: object | None = None, dt: float | None = None,
                 integrator: str = "rk4") -> None:
        self.params = self.Params() if params is None else params
        self.task = self.Task() if task is None else task
        if not isinstance(self.params, self.Params):
            raise TypeError(f"params for {self.name} must be {self.Params.__name__}, got {type(self.params).__name__}")
        if not isinstance(self.task, self.Task):
            raise TypeError(f"task for {self.name} must be {self.Task.__name__}, got {type(self.task).__name__}")
        self.dt = float(self.default_dt if dt is None else dt)
        if not (math.isfinite(self.dt) and self.dt > 0):
            raise ValueError(f"dt must be a positive number of seconds, got {dt}")
        sweep = getattr(type(self), "robustness_params", None)
        if not (isinstance(sweep, tuple) and sweep and all(isinstance(n, str) for n in sweep)):
            raise TypeError(f"{type(self).__name__}.robustness_params must be a non-empty tuple of Params field names "
                            f"(the parameters a robustness sweep varies), got {sweep!r}; declare it on the class")
        if integrator not in INTEGRATORS:
            raise ValueError(f"unknown integrator {integrator!r}; choose one of {sorted(INTEGRATORS)}")
        self.integrator = integrator

    # ---- sizes and names -------------------------------------------------------------------------------
    @property
    def state_dim(self) -> int:
        return len(self.state)

    @property
    def action_dim(self) -> int:
        return len(self.action)

    @property
    def n_q(self) -> int:
        return self.state_dim // 2

    @property
    def obs_names(self) -> tuple[str, ...]:
        names: list[str] = []
        for s in self.state:
            names += [f"sin({s.name})", f"cos({s.name})"] if s.angle else [s.name]
        return tuple(names)

    @property
    def obs_dim(self) -> int:
        return len(self.obs_names)

    @property
    def action_low(self) -> tuple[float, ...]:
        return tuple(0.0 if self.one_sided else -b for b in self.action_high)

    @property
    def action_high(self) -> tuple[float, ...]:
        return tuple(float(getattr(self.params, name)) for name in self.action_limits)

    def actuator_range(self, batch: int, dtype: torch.dtype, device: torch.device | str = "cpu") -> tuple[Tensor, Tensor]:
        """The lowest and highest action each actuator delivers, ``(batch, action_dim)`` each (per batch element
        where a limit parameter is a ``(B,)`` tensor)."""
        hi = torch.stack([torch.as_tensor(getattr(self.params, name), dtype=dtype, device=device).expand(batch)
                          for name in self.action_limits], dim=-1)  # (B, action_dim)
        return (torch.zeros_like(hi) if self.one_sided else -hi), hi

    def saturate(self, u: Tensor, limits: tuple[Tensor, Tensor] | None = None) -> Tensor:
        """What the actuators deliver for the command ``u`` ``(B, action_dim)``: each action held within its
        limits (``limits`` from :meth:`actuator_range`, computed here if not given). The closed loop applies it to
        every command, whatever the policy; a squashed policy's actions are already inside and pass unchanged,
        gradient included (``clamp`` passes the gradient on its closed interval)."""
        lo, hi = limits if limits is not None else self.actuator_range(u.shape[0], u.dtype, u.device)
        return torch.clamp(u, lo, hi)

    def replace(self, **changes: object) -> "System":
        """A copy with some of ``params``, ``task``, ``dt`` or ``integrator`` replaced."""
        kw = dict(params=self.params, task=self.task, dt=self.dt, integrator=self.integrator)
        kw.update(changes)
        return type(self)(**kw)  # type: ignore[arg-type]

    # ---- dynamics ---------------------------------------------------------------------------------------
    @abc.abstractmethod
    def acceleration(self, q: Tensor, qd: Tensor, u: Tensor) -> Tensor:
        """Continuous-time generalised acceleration ``qdd``, shape ``(B, n_q)``."""

    def step(self, x: Tensor, u: Tensor) -> Tensor:
        q, qd = x[..., : self.n_q], x[..., self.n_q:]
        q1, qd1 = integrator_step(self.integrator, self.acceleration, q, qd, u, self.dt)
        return torch.cat([q1, qd1], dim=-1)

    def derivative(self, x: Tensor, u: Tensor) -> Tensor:
        """``dx/dt`` of the continuous-time model (for reference integrations and linearisation)."""
        q, qd = x[..., : self.n_q], x[..., self.n_q:]
        return torch.cat([qd, self.acceleration(q, qd, u)], dim=-1)

    def observe(self, x: Tensor) -> Tensor:
        cols = []
        for i, s in enumerate(self.state):
            if s.angle:
                cols += [torch.sin(x[..., i]), torch.cos(x[..., i])]
            else:
                cols.append(x[..., i])
        return torch.stack(cols, dim=-1)

    # ---- task -------------------------------------------------------------------------------------------
    def running_cost(self, x: Tensor, u: Tensor) -> Tensor:
        """Cost of one step, ``(stage_cost(x) + effort_cost(u)) * dt``, shape ``(B,)``."""
        return (self.stage_cost(x) + self.effort_cost(u)) * self.dt

    def terminal_cost(self, x: Tensor) -> Tensor:
        """Cost of the final state, shape ``(B,)``; by default the stage cost with terminal weight 1."""
        return self.stage_cost(x)

    @abc.abstractmethod
    def stage_cost(self, x: Tensor) -> Tensor:
        """Rate of the state's cost (per second of the horizon), shape ``(B,)``."""

    @abc.abstractmethod
    def effort_cost(self, u: Tensor) -> Tensor:
        """Rate of the action's cost (per second of the horizon), shape ``(B,)``."""

    def sample_initial(self, n: int, generator: torch.Generator, dtype: torch.dtype = torch.float32) -> Tensor:
        """``n`` initial states from the task's distribution, shape ``(n, state_dim)``.

        By default uniform over the box ``task.init_low`` .. ``task.init_high``; override for other distributions.
        """
        return box_sample(self.task.init_low, self.task.init_high, n, generator, dtype)

    @abc.abstractmethod
    def success(self, states: Tensor, actions: Tensor) -> Tensor:
        """Whether each trajectory met the task, shape ``(B,)`` bool."""

    def final_window(self, states: Tensor, seconds: float) -> Tensor:
        """The last ``seconds`` of a ``(T+1, B, n)`` trajectory (at least one state)."""
        k = max(1, int(round(seconds / self.dt)))
        return states[-k:]

    @property
    def success_criterion(self) -> str:
        """One sentence saying what ``success`` checks, for reports."""
        return ""

    # ---- deployment facts -------------------------------------------------------------------------------
    @property
    @abc.abstractmethod
    def state_limits(self) -> dict[str, tuple[float, float]]:
        """State limits counted as violations, ``{state name: (low, high)}`` in the state's unit (angles are
        compared wrapped to (-pi, pi]); each system says where its numbers come from."""

    @abc.abstractmethod
    def sketch(self, x: Sequence[float]) -> list[Primitive]:
        """The machine and its scenery in state ``x`` ``(state_dim,)``, as :mod:`envs.sketch` records in metres.

        Tensor-valued (per-batch) parameters are drawn at their mean (:func:`scalar`).
        """

    def sketch_bounds(self, states: Sequence[Sequence[float]]) -> tuple[float, float, float, float]:
        """The view ``(x_low, x_high, y_low, y_high)`` (m) for an episode of ``states`` ``(T+1, state_dim)``.

        By default every sketch of the episode plus a 10 % margin; systems override it for a steadier view.
        """
        x0, x1, y0, y1 = extent(p for x in states for p in self.sketch(x))
        mx, my = 0.1 * max(x1 - x0, 1e-3), 0.1 * max(y1 - y0, 1e-3)
        return (x0 - mx, x1 + mx, y0 - my, y1 + my)


def scalar(v: object) -> float:
    """A parameter as one number: a per-batch tensor is drawn (and sized) at its mean."""
    if isinstance(v, Tensor):
        return float(v.detach().double().mean())
    return float(v)  # type: ignore[arg-type]
