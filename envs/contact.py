"""Differentiable soft contact: a smoothed spring-damper normal force and regularised Coulomb friction.

Every function is pure and batched: arguments broadcast against each other (a parameter may be a Python number or
a ``(B,)`` tensor, one model per batch element) and nothing is mutated. The normal force is smooth in every
argument, so analytic gradients exist everywhere, including across the instant of touch-down; friction is smooth
except for a kink where the normal force changes sign (there the friction itself is zero).

Normal force. Between two bodies with signed gap ``g`` (m; > 0 apart, < 0 overlapping) closing at ``-g'``, the
linear spring-dashpot (Kelvin-Voigt) contact pushes them apart with ``N = k d + c d'``, ``d = max(-g, 0)`` the
penetration (Kelvin-Voigt is the standard linear viscoelastic element; its use as an impact law and its
coefficient of restitution, below, are in Stronge, *Impact Mechanics*, 2000; from memory). Here the kink of
``max`` is replaced by a softplus of width ``w``:

    d_w = w log(1 + exp(-g / w)),        d/dt d_w = sigmoid(-g / w) (-g')

so ``d_w -> max(-g, 0)`` as ``w -> 0``, and ahead of contact (``g >> w``) the force and its gradient are nonzero
but decay like ``exp(-g / w)``: a policy's gradient "sees" a contact that is about to happen. The damping term
uses the time derivative of the same smoothed penetration, so the model is exactly a Kelvin-Voigt element acting
on ``d_w``. As in any linear spring-dashpot, ``c d'`` pulls the bodies together briefly just before they separate
(a small tensile force); Hunt & Crossley (1975, "Coefficient of restitution interpreted as damping in
vibroimpact", J. Appl. Mech. 42) scale the damping with ``d`` to remove it. The linear form is kept because its
restitution has the closed form of :func:`kelvin_voigt_restitution`, which the tests check.

Friction. Regularised Coulomb friction ``F_t = -mu max(N, 0) tanh(v / v_eps)`` with ``v`` the slip velocity:
Coulomb's law ``|F_t| <= mu N`` with the sign discontinuity at ``v = 0`` smoothed over ``|v| ~ v_eps`` (one of
the smooth approximations of Coulomb friction compared by Pennestri, Rossi, Salvini & Valentini, "Review and
comparison of dry friction force models", Nonlinear Dynamics 83, 2016; from memory). Only the compressive part of
``N`` carries friction, so the friction cone holds exactly. Near ``v = 0`` it acts as a viscous damper of
coefficient ``mu N / v_eps``: an explicit integrator needs ``dt mu N / (m v_eps)`` below about 2 (semi-implicit
Euler) or 2.8 (RK4) for stability, ``m`` the mass of the sliding body.
"""

from __future__ import annotations

import math

import torch
from torch import Tensor

Scalar = float | Tensor  # a number, or a (B,) tensor of per-batch values


def smooth_penetration(gap: Tensor, smoothing: Scalar) -> Tensor:
    """Softplus-smoothed penetration depth ``w log(1 + exp(-gap / w))`` (m), ``>= 0``, same shape as ``gap``.

    Args:
        gap: signed gap (m), positive when the bodies are apart.
        smoothing: softplus width ``w`` > 0 (m); smaller is sharper.
    """
    z = -gap / smoothing
    # log(1 + e^z) as logaddexp(z, 0): stable for any z and smooth everywhere (F.softplus switches to z above a
    # threshold, a step of ~1e-9 relative that finite differences would see)
    return smoothing * torch.logaddexp(z, torch.zeros_like(z))


def normal_force(gap: Tensor, gap_rate: Tensor, stiffness: Scalar, damping: Scalar, smoothing: Scalar) -> Tensor:
    """Kelvin-Voigt normal force on a smoothed penetration, ``k d_w + c (d/dt) d_w`` (N), positive pushing apart.

    Args:
        gap: signed gap (m), positive apart, any shape.
        gap_rate: d gap / dt (m/s), same shape (negative while approaching).
        stiffness: ``k`` (N/m); damping: ``c`` (N s/m); smoothing: softplus width ``w`` (m). Numbers or tensors
            broadcasting against ``gap``.

    Returns:
        The force, shape of ``gap``. It is slightly negative (tensile) late in the restitution phase, as in the
        linear Kelvin-Voigt model it smooths.
    """
    depth = smooth_penetration(gap, smoothing)
    depth_rate = torch.sigmoid(-gap / smoothing) * (-gap_rate)  # d/dt of smooth_penetration
    return stiffness * depth + damping * depth_rate


def friction_force(normal: Tensor, slip_velocity: Tensor, coefficient: Scalar, smoothing: Scalar) -> Tensor:
    """Regularised Coulomb friction ``-mu max(N, 0) tanh(v / v_eps)`` (N), opposing the slip.

    Args:
        normal: normal force (N) from :func:`normal_force`; its tensile part carries no friction.
        slip_velocity: tangential velocity of the contact point relative to the surface (m/s), same shape.
        coefficient: friction coefficient ``mu`` >= 0; smoothing: ``v_eps`` > 0 (m/s), the slip speed over which
            the force reverses.

    Returns:
        The tangential force on the body, shape of ``normal``; ``|F_t| <= mu max(N, 0)`` always.
    """
    return -coefficient * torch.relu(normal) * torch.tanh(slip_velocity / smoothing)


def kelvin_voigt_restitution(stiffness: Scalar, damping: Scalar, mass: Scalar) -> Scalar:
    """Coefficient of restitution of a linear spring-dashpot contact, ``exp(-zeta pi / sqrt(1 - zeta^2))``.

    ``zeta = c / (2 sqrt(k m))`` with ``m`` the effective mass of the pair, ``m1 m2 / (m1 + m2)``. The bodies
    separate after half a damped period, ``pi / (w_n sqrt(1 - zeta^2))``, with the velocity scaled by this
    factor, independent of the impact speed (Stronge, *Impact Mechanics*, 2000; from memory). Without
    gravity and with a sharp onset; an overdamped contact (``zeta >= 1``) never releases and gives 0.

    Returns a float for numbers, a tensor for tensor arguments.
    """
    if not any(isinstance(v, Tensor) for v in (stiffness, damping, mass)):
        zeta = damping / (2.0 * math.sqrt(stiffness * mass))
        return math.exp(-zeta * math.pi / math.sqrt(1.0 - zeta ** 2)) if zeta < 1.0 else 0.0
    zeta = torch.as_tensor(damping) / (2.0 * torch.sqrt(torch.as_tensor(stiffness * mass)))
    under = zeta < 1.0
    safe = torch.where(under, zeta, torch.zeros_like(zeta))  # keeps sqrt(1 - zeta^2) real where unused
    return torch.where(under, torch.exp(-safe * math.pi / torch.sqrt(1.0 - safe ** 2)), torch.zeros_like(zeta))
