"""Gradient estimators of the rollout objective ``J(theta) = E_x0[ sum_t c(x_t, u_t) + c_T(x_T) ]``.

Every estimator answers the same question: given a policy, a minibatch of initial states and a seeded
generator, what is (an estimate of) ``dJ/dtheta``, and how many simulator steps did that cost? The trainer
takes any of them, so adding one is one file in this package (a :class:`~apg.estimators.base.GradientEstimator`
subclass; the contract is stated on that class), one line in :data:`ESTIMATORS` and a YAML file in
``configs/estimator``. The files: ``base.py`` (settings, result, interface), ``analytic.py``,
``terminal_value.py``, ``evolution.py`` (``es``) and ``action_noise.py`` (``likelihood_ratio``, ``alpha_order``).

Which objective each one estimates (its reference gradient, :meth:`GradientEstimator.reference_gradient`):

* ``analytic``: the exact minibatch objective, by backpropagation through time. With ``window > 0`` the
  rollout is cut into windows with the state detached between them (truncated BPTT): a biased, myopic gradient
  whose step-Jacobian products never span more than ``window`` steps.
* ``terminal_value``: truncated BPTT windows, each ending in a learned value function of the state and the time
  left, fitted to the rollouts' cost-to-go (the short-horizon actor-critic of Xu, Makoviychuk, Narang, Ramos,
  Matusik, Garg, Macklin 2022, "Accelerated policy learning with parallel differentiable simulation"); the value
  carries the gradient of the cost beyond each window, as far as it is learned.
* ``es``: the parameter-smoothed objective ``J_sigma(theta) = E_eps[J(theta + sigma eps)]``, eps ~ N(0, I),
  by Gaussian smoothing with antithetic pairs (Salimans, Ho, Chen, Sidor, Sutskever 2017, "Evolution strategies
  as a scalable alternative to reinforcement learning"; the smoothing identity is Nesterov & Spokoiny 2017).
  With ``rank_shaping`` the costs are replaced by centred ranks, as Salimans et al. do: the update is then
  invariant to any increasing transformation of the cost but no longer an unbiased gradient of anything.
* ``likelihood_ratio``: the action-smoothed objective, the expected cost when Gaussian noise is added to every
  action, by the score-function estimator (Williams 1992, REINFORCE) with cost-to-go and a leave-one-out
  baseline over the noisy rollouts of the same initial state (both keep it unbiased).
* ``alpha_order``: the same action-smoothed objective, as ``alpha * first-order + (1 - alpha) * zeroth-order``
  on one shared set of noisy rollouts (Suh, Simchowitz, Zhang, Tedrake 2022, "Do differentiable simulators give
  better policy gradients?"): the first-order term is the pathwise (reparameterised) gradient through the
  noisy rollouts, the zeroth-order term the likelihood-ratio estimate above. ``alpha`` is fixed here.

Noisy actions are clipped to the system's action limits before they reach the simulator; the clip counts as
part of the system, so the score uses the unclipped Gaussian draw (common practice in policy-gradient codes).
"""

from __future__ import annotations

import warnings

from apg.estimators.action_noise import AlphaOrder, LikelihoodRatio
from apg.estimators.analytic import Analytic
from apg.estimators.base import BASELINES, Estimate, EstimatorSettings, GradientEstimator
from apg.estimators.evolution import EvolutionStrategies, centred_ranks
from apg.estimators.terminal_value import TerminalValue, ValueNetwork

__all__ = ["BASELINES", "ESTIMATORS", "AlphaOrder", "Analytic", "Estimate", "EstimatorSettings", "EvolutionStrategies",
           "GradientEstimator", "LikelihoodRatio", "TerminalValue", "ValueNetwork", "centred_ranks", "make_estimator"]

ESTIMATORS: dict[str, type[GradientEstimator]] = {
    cls.name: cls for cls in (Analytic, TerminalValue, EvolutionStrategies, LikelihoodRatio, AlphaOrder)}


def make_estimator(settings: EstimatorSettings) -> GradientEstimator:
    """The estimator named in ``settings``; an unknown name lists the valid ones. Warns about ignored options."""
    try:
        cls = ESTIMATORS[settings.name]
    except KeyError:
        raise ValueError(f"unknown estimator {settings.name!r}; choose one of {', '.join(sorted(ESTIMATORS))}") from None
    for key in settings.ignored():
        warnings.warn(f"estimator.{key} is ignored by estimator.name={settings.name}", stacklevel=2)
    return cls(settings)  # type: ignore[call-arg]
