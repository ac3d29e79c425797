"""Optimisers and learning-rate schedules, built from a small record."""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Iterable

import torch

from envs.base import bounded, check_record

OPTIMISERS = ("adam", "sgd")
SCHEDULES = ("constant", "cosine", "step")


@dataclass(frozen=True)
class OptimSettings:
    """What optimiser to use; ``configs/optim/*.yaml`` fill this record."""

    name: str = "adam"  # adam | sgd
    lr: float = bounded(3e-3, positive=True)
    betas: tuple[float, ...] = (0.9, 0.999)  # adam only
    momentum: float = bounded(0.0, nonnegative=True)  # sgd only
    nesterov: bool = False  # sgd only
    weight_decay: float = bounded(0.0, nonnegative=True)
    schedule: str = "cosine"  # constant | cosine (to final_lr_fraction * lr) | step (times gamma every step_every)
    warmup_iterations: int = bounded(0, nonnegative=True)  # linear ramp from lr / warmup_iterations
    final_lr_fraction: float = bounded(0.1, nonnegative=True)
    step_every: int = bounded(100, positive=True)
    gamma: float = bounded(0.5, positive=True)

    def __post_init__(self) -> None:
        if self.name not in OPTIMISERS:
            raise ValueError(f"name must be one of {', '.join(OPTIMISERS)}; got {self.name!r}")
        if self.schedule not in SCHEDULES:
            raise ValueError(f"schedule must be one of {', '.join(SCHEDULES)}; got {self.schedule!r}")
        if len(self.betas) != 2 or not all(0 <= b < 1 for b in self.betas):
            raise ValueError(f"betas must be two numbers in [0, 1), got {list(self.betas)}")
        check_record(self)

    def ignored(self) -> list[str]:
        """Options set away from their defaults that this optimiser does not use."""
        unused = {"adam": ("momentum", "nesterov"), "sgd": ("betas",)}[self.name]
        default = OptimSettings()
        return [k for k in unused if getattr(self, k) != getattr(default, k)]


def make_optimiser(settings: OptimSettings, params: Iterable[torch.nn.Parameter]) -> torch.optim.Optimizer:
    """The optimiser named in ``settings``; warns about options it ignores."""
    for key in settings.ignored():
        warnings.warn(f"optim.{key} is ignored by optim.name={settings.name}", stacklevel=2)
    if settings.name == "adam":
        return torch.optim.Adam(params, lr=settings.lr, betas=tuple(settings.betas), weight_decay=settings.weight_decay)
    return torch.optim.SGD(params, lr=settings.lr, momentum=settings.momentum, nesterov=settings.nesterov,
                           weight_decay=settings.weight_decay)


def learning_rate(settings: OptimSettings, iteration: int, total: int) -> float:
    """The learning rate at ``iteration`` (0-based) of ``total``: a pure function, so resuming needs no state."""
    lr = settings.lr
    if settings.warmup_iterations and iteration < settings.warmup_iterations:
        return lr * (iteration + 1) / settings.warmup_iterations
    if settings.schedule == "cosine":
        span = max(1, total - settings.warmup_iterations)
        frac = min(1.0, (iteration - settings.warmup_iterations) / span)
        f = settings.final_lr_fraction
        return lr * (f + (1 - f) * 0.5 * (1 + math.cos(math.pi * frac)))
    if settings.schedule == "step":
        return lr * settings.gamma ** ((iteration - settings.warmup_iterations) // settings.step_every)
    return lr
