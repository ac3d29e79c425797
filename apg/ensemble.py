"""Model ensembles: physical parameters drawn per minibatch element from ranges (domain randomisation).

Training over an ensemble asks the policy to work for every model in the ranges at once, which is what lets it
survive the gap between the model and the real machine (Tobin et al. 2017; Peng et al. 2018).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Mapping, Sequence

import torch

from envs.base import System


@dataclass(frozen=True)
class ParameterRanges:
    """Uniform ranges ``(name, low, high)`` over fields of a system's ``Params`` record."""

    ranges: tuple[tuple[str, float, float], ...] = ()

    @classmethod
    def from_mapping(cls, values: Mapping[str, Sequence[float]] | None) -> "ParameterRanges":
        """From ``{"load_mass": [8000, 12000], ...}``; raises ``ValueError`` naming a malformed entry."""
        out = []
        for name, bounds in (values or {}).items():
            if len(bounds) != 2 or not float(bounds[0]) <= float(bounds[1]):
                raise ValueError(f"system.ensemble.{name} must be [low, high] with low <= high, got {list(bounds)}")
            out.append((str(name), float(bounds[0]), float(bounds[1])))
        return cls(tuple(out))

    def __bool__(self) -> bool:
        return bool(self.ranges)

    def check(self, system: System) -> None:
        """Every name must be a physical parameter, and both ends must be valid values for it."""
        fields = [f.name for f in dataclasses.fields(system.params)]
        for name, low, high in self.ranges:
            if name not in fields:
                raise ValueError(f"system.ensemble.{name}: {system.name} has no parameter {name!r}; "
                                 f"its parameters are {fields}")
            for v in (low, high):
                try:
                    dataclasses.replace(system.params, **{name: v})
                except ValueError as e:
                    raise ValueError(f"system.ensemble.{name}: {e}") from None

    def sample(self, system: System, n: int, generator: torch.Generator, dtype: torch.dtype) -> System:
        """A copy of ``system`` whose ranged parameters are ``(n,)`` tensors, one model per batch element."""
        if not self.ranges:
            return system
        draws = {name: low + (high - low) * torch.rand(n, generator=generator, dtype=dtype)
                 for name, low, high in self.ranges}
        return system.replace(params=dataclasses.replace(system.params, **draws))
