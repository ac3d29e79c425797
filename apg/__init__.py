"""apg: train feedback controllers for planar machines by analytic policy gradients.

Public API (everything else is internal):

* policies: :class:`PolicySettings`, :class:`Policy`, :func:`make_policy`
* rollouts: :func:`rollout`, :func:`evaluate`, :class:`Trajectory`
* gradients: :class:`GradientEstimator`, :class:`Analytic` (BPTT, optionally truncated), :class:`TerminalValue`
  (short-horizon actor-critic), :class:`EvolutionStrategies`, :class:`LikelihoodRatio`, :class:`AlphaOrder`,
  :func:`make_estimator`
* diagnostics: :func:`gradient_profile` (per-time-step gradient norms, state-Jacobian growth), :class:`GradientProfile`
* training: :class:`TrainSettings`, :class:`OptimSettings`, :func:`train`, :func:`load_policy`
"""

from apg.diagnostics import GradientProfile, gradient_profile
from apg.estimators import (AlphaOrder, Analytic, Estimate, EstimatorSettings, EvolutionStrategies, GradientEstimator,
                            LikelihoodRatio, TerminalValue, make_estimator)
from apg.optim import OptimSettings
from apg.policies import Policy, PolicySettings, make_policy
from apg.rollout import Evaluation, Trajectory, evaluate, rollout, truncated_rollout
from apg.trainer import Monitor, NonFiniteError, RunExistsError, TrainSettings, load_policy, train

__all__ = ["AlphaOrder", "EvolutionStrategies", "LikelihoodRatio", "Analytic", "TerminalValue", "GradientProfile",
           "gradient_profile", "Estimate", "EstimatorSettings", "GradientEstimator", "make_estimator", "OptimSettings",
           "Policy", "PolicySettings", "make_policy", "Evaluation", "Trajectory", "evaluate", "rollout", "truncated_rollout", "Monitor",
           "NonFiniteError", "RunExistsError", "TrainSettings", "load_policy", "train"]
