"""Feedback policies ``u = pi(observe(x))``: observation normalisation, a linear or MLP core, bounded actions.

The normaliser's statistics are buffers, so they are saved and restored with the policy's ``state_dict``.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import Tensor, nn

from envs.base import System, bounded, check_record

ACTIVATIONS = {"tanh": nn.Tanh, "relu": nn.ReLU, "elu": nn.ELU, "gelu": nn.GELU, "silu": nn.SiLU}
NORMALISERS = ("initial", "running", "none")
SQUASHES = ("tanh", "none")
KINDS = ("mlp", "linear")


@dataclass(frozen=True)
class PolicySettings:
    """What policy to build; ``configs/policy/*.yaml`` fill this record."""

    kind: str = "mlp"  # mlp | linear
    hidden: tuple[int, ...] = (64, 64)  # MLP widths (ignored by linear)
    activation: str = "tanh"  # tanh | relu | elu | gelu | silu (ignored by linear)
    bias: bool = True
    normalise: str = "initial"  # initial: from the initial-state distribution; running: from rollouts; none
    # smallest standard deviation the normaliser divides by (observation units)
    std_floor: float = bounded(0.1, positive=True)
    squash: str = "tanh"  # tanh: smooth map into the system's action limits; none: unbounded (LQR checks)
    # scale of the last layer's initial weights, so early actions stay moderate
    output_gain: float = bounded(0.1, positive=True)

    def __post_init__(self) -> None:
        for key, value, valid in (("kind", self.kind, KINDS), ("activation", self.activation, tuple(ACTIVATIONS)),
                                  ("normalise", self.normalise, NORMALISERS), ("squash", self.squash, SQUASHES)):
            if value not in valid:
                raise ValueError(f"{key} must be one of {', '.join(valid)}; got {value!r}")
        if any(int(h) < 1 for h in self.hidden):
            raise ValueError(f"hidden widths must be >= 1, got {list(self.hidden)}")
        check_record(self)


def mlp(sizes: list[int], activation: str, bias: bool = True) -> nn.Sequential:
    """Linear layers between consecutive ``sizes``, each but the last followed by ``activation``
    (a key of ``ACTIVATIONS``): the core of the policies and of the value networks."""
    layers: list[nn.Module] = []
    for i, (a, b) in enumerate(zip(sizes[:-1], sizes[1:])):
        layers.append(nn.Linear(a, b, bias=bias))
        if i < len(sizes) - 2:
            layers.append(ACTIVATIONS[activation]())
    return nn.Sequential(*layers)


class Normaliser(nn.Module):
    """``(obs - mean) / max(std, floor)`` with statistics fixed, or merged from batches (Chan et al. 1979)."""

    def __init__(self, dim: int, mode: str, floor: float) -> None:
        super().__init__()
        self.mode = mode
        self.floor = floor
        self.register_buffer("mean", torch.zeros(dim))
        self.register_buffer("var", torch.ones(dim))
        self.register_buffer("count", torch.zeros((), dtype=torch.float64))

    def forward(self, obs: Tensor) -> Tensor:
        if self.mode == "none":
            return obs
        return (obs - self.mean) / self.var.sqrt().clamp_min(self.floor)

    @torch.no_grad()
    def update(self, obs: Tensor) -> None:
        """Merge a batch ``(..., dim)`` of observations into the statistics."""
        flat = obs.detach().reshape(-1, obs.shape[-1]).to(self.mean.dtype)  # (N, dim)
        n = flat.shape[0]
        if n == 0:
            return
        b_mean, b_var = flat.mean(0), flat.var(0, unbiased=False)
        total = self.count + n
        delta = b_mean - self.mean
        frac = (n / total).to(self.mean.dtype)
        self.mean += delta * frac
        self.var.copy_((self.var * (1 - frac) + b_var * frac + delta ** 2 * frac * (1 - frac)))
        self.count.copy_(total)


class Policy(nn.Module):
    """A deterministic feedback policy for one system: observation in, bounded action out.

    ``forward(obs)`` takes ``(B, obs_dim)`` observations (``System.observe``) and returns ``(B, action_dim)``
    actions in the system's units, inside ``[action_low, action_high]`` when ``squash == "tanh"``.
    """

    def __init__(self, settings: PolicySettings, obs_dim: int, action_low: tuple[float, ...],
                 action_high: tuple[float, ...]) -> None:
        super().__init__()
        self.settings = settings
        self.normaliser = Normaliser(obs_dim, settings.normalise, settings.std_floor)
        hidden = tuple(settings.hidden) if settings.kind == "mlp" else ()
        self.net = mlp([obs_dim, *hidden, len(action_low)], settings.activation, bias=settings.bias)
        last = self.net[-1]
        with torch.no_grad():
            last.weight.mul_(settings.output_gain)
            if last.bias is not None:
                last.bias.zero_()
        low = torch.tensor(action_low, dtype=torch.get_default_dtype())
        high = torch.tensor(action_high, dtype=torch.get_default_dtype())
        if settings.squash == "tanh" and not (torch.isfinite(low).all() and torch.isfinite(high).all()):
            raise ValueError("policy.squash=tanh needs finite action limits; use policy.squash=none")
        self.register_buffer("action_low", low)
        self.register_buffer("action_high", high)

    def forward(self, obs: Tensor) -> Tensor:
        z = self.net(self.normaliser(obs))
        if self.settings.squash == "none":
            return z
        return self.action_low + (self.action_high - self.action_low) * 0.5 * (torch.tanh(z) + 1.0)


def make_policy(settings: PolicySettings, system: System, generator: torch.Generator | None = None,
                init_samples: int = 4096, dtype: torch.dtype = torch.float32) -> Policy:
    """Build a policy for ``system``; with ``normalise == "initial"`` its statistics come from
    ``init_samples`` draws of the system's initial-state distribution (using ``generator``)."""
    policy = Policy(settings, system.obs_dim, system.action_low, system.action_high).to(dtype)
    if settings.normalise == "initial":
        gen = generator if generator is not None else torch.Generator().manual_seed(0)
        policy.normaliser.update(system.observe(system.sample_initial(init_samples, gen, dtype)))
    return policy
