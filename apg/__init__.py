"""apg: train feedback controllers for planar machines by analytic policy gradients.

Public API (everything else is internal):

* policies: :class:`PolicySettings`, :class:`Policy`, :func:`make_policy`
* rollouts: :func:`rollout`, :func:`evaluate`, :class:`Trajectory`
* gradients: :class:`GradientEstimator`, :class:`Analytic` (BPTT), :class:`EvolutionStrategies`,
  :class:`LikelihoodRatio`, :class:`AlphaOrder`, :func:`make_estimator`
* training: :class:`TrainSettings`, :class:`OptimSettings`, :func:`train`, :func:`load_policy`
"""

from apg.estimators import (AlphaOrder, Analytic, Estimate, EstimatorSettings, EvolutionStrategies, GradientEstimator,
                            LikelihoodRatio, make_estimator)
from apg.optim import OptimSettings
from apg.policies import Policy, PolicySettings, make_policy
from apg.rollout import Evaluation, Trajectory, evaluate, rollout
from apg.trainer import Monitor, NonFiniteError, RunExistsError, TrainSettings, load_policy, train

__all__ = ["AlphaOrder", "EvolutionStrategies", "LikelihoodRatio", "Analytic", "Estimate", "EstimatorSettings", "GradientEstimator", "make_estimator", "OptimSettings",
           "Policy", "PolicySettings", "make_policy", "Evaluation", "Trajectory", "evaluate", "rollout", "Monitor",
           "NonFiniteError", "RunExistsError", "TrainSettings", "load_policy", "train"]
